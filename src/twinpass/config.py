"""The job configuration (TOML), validated into frozen dataclasses.

Relative paths in a configuration are relative to the configuration file's folder.
Unknown keys, wrong types, numbers that are not finite (TOML's nan and inf) and values out
of range are errors naming the file, the table and the key.

Example::

    [response]                       # the OVERALL (two-pass) response
    kind = "bandpass"
    family = "auto"
    passband_hz = [0.5, 30.0]
    stopband_hz = [0.1, 45.0]
    passband_ripple_db = 1.0
    stopband_attenuation_db = 60.0

    [processing]
    tolerance = 1e-9
    edge = "odd"
    edge_samples = "auto"

    [archive]
    root = "archive"
    include = ["**/*.wav"]

    [archive.channels."mast-top"]    # one stream's channel names and units
    names = ["north", "east", "up"]
    units = "m/s^2"

    [output]
    store = "filtered.zarr"
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping, get_args, get_origin, get_type_hints

from .core.types import EDGE_MODES, FAMILIES, KINDS, ResponseSpec
from .errors import ConfigError


@dataclass(frozen=True)
class ProcessingConfig:
    """How blocks are filtered."""

    tolerance: float = 1e-9
    """Largest |blockwise - whole segment| / max |input of the segment|; sets the halo."""
    edge: str = "odd"
    """End extension at segment ends: odd | even | constant | none."""
    edge_samples: int | str = "auto"
    """Length of the end extension in samples, or "auto" (the effective length, capped)."""
    block_seconds: float | None = None
    """Core length of a block in seconds; None = automatic (the longer of 24 halos and 65536 samples, less where
    memory_budget_mib fits less, then cut equal within each file)."""
    memory_budget_mib: float = 256.0
    """Upper bound on one block's working memory (window + output, float64), MiB."""
    mode: str = "auto"
    """halo | carry | auto: carry filter states instead of halos when the halo exceeds
    ``carry_threshold`` times the block length, or no block with its halos fits
    ``memory_budget_mib`` (IIR only)."""
    carry_threshold: float = 1.0
    """Halo length / block length (a ratio > 0) above which ``mode = "auto"`` carries states."""
    nonfinite: str = "fail"
    """Policy for NaN/Inf runs in float input: fail | split | interpolate."""
    max_fill_samples: int = 0
    """Longest NaN/Inf run filled by linear interpolation when ``nonfinite = "interpolate"``."""


CHANNELS_ANY_STREAM = "*"
"""The ``[archive.channels]`` table that applies to every stream, for the keys (names, units)
the stream's own table does not give."""


@dataclass(frozen=True)
class StreamChannels:
    """Channel names and units given for one stream (``[archive.channels."<stream>"]``)."""

    stream: str
    """The stream's name, or :data:`CHANNELS_ANY_STREAM` for every stream."""
    names: tuple[str, ...] | None = None
    """One name per channel, in the recordings' channel order; None when not given."""
    units: str | tuple[str, ...] | None = None
    """One unit for every channel (a string), one per channel (a tuple), or None."""

    @property
    def table(self) -> str:
        """The TOML table that gave these, for messages: ``[archive.channels."mast-top"]``."""
        return f"[archive.channels.{json.dumps(self.stream)}]"


@dataclass(frozen=True)
class ArchiveConfig:
    """Where the input recordings are and how they group into streams."""

    root: str = "archive"
    include: tuple[str, ...] = ("**/*.wav", "**/*.npy", "**/*.raw", "**/*.bin", "**/*.dat")
    exclude: tuple[str, ...] = ()
    name_pattern: str | None = None
    """Pattern matched against the relative path without suffix, e.g.
    ``"{stream}/{stream}_{start:%Y%m%dT%H%M%S}"``."""
    manifest: str | None = None
    """CSV with columns path, stream, start_time (ISO 8601)."""
    sample_rate_hz: float | None = None
    """Sample rate (Hz, > 0) for formats that do not store one (NPY)."""
    fingerprint: str = "fast"
    """fast (size + first and last MiB) | full (every byte)."""
    truncated: str = "error"
    """WAV data chunk shorter than its header claims: error | warn (read whole frames)."""
    wrapped_sizes: str = "error"
    """Plain RIFF WAV over 4 GiB whose 32-bit sizes wrapped (data the last chunk, ending before
    the file): error | read (the data runs to the end of the file)."""
    max_channels: int = 1024
    """Most channels a recording of fewer samples than channels may have (>= 1); a file with
    more channels than both is left out, most likely a 2-D array stored channel-major,
    (channels, samples), instead of time-major. Files of more samples than channels are read
    whatever their channel count."""
    channels: tuple[StreamChannels, ...] | None = None
    """Channel names and units per stream (``[archive.channels."<stream>"]``, ``"*"`` for every
    stream), written to the outputs' attributes; None when none are given."""

    def channels_for(self, stream: str) -> tuple[StreamChannels | None, StreamChannels | None]:
        """The stream's own ``[archive.channels]`` table and the ``"*"`` one (None where absent)."""
        by_stream = {c.stream: c for c in self.channels or ()}
        return by_stream.get(stream), by_stream.get(CHANNELS_ANY_STREAM)


@dataclass(frozen=True)
class OutputConfig:
    """The Zarr output store."""

    store: str = "filtered.zarr"
    """Local path (relative to the config file) or an fsspec URL."""
    dtype: str = "float32"
    """float32 | float64."""
    compression: str = "lz4"
    """none | lz4 | zstd (Blosc, with bit shuffle)."""
    chunk_seconds: float | None = None
    """Output chunk length in seconds; None = one chunk per block. Blocks are whole chunks,
    within ``[processing] memory_budget_mib``."""
    sync: bool = True
    """Sync each block's output to disk before recording the block done (local stores), so
    that what the store records as done survives a power cut. With local workers the driver
    syncs while the workers compute on; workers of a scheduler given by address sync their
    own. false skips it, for copies that can simply be made again (on this bench machine a
    forced band-pass run about 7 % faster)."""


@dataclass(frozen=True)
class EngineConfig:
    """Parallel execution of blocks on Dask."""

    scheduler: str = "threads"
    """threads | processes | a distributed scheduler address (tcp://host:port)."""
    workers: int = 2
    retries: int = 2
    """Extra attempts for a failing block."""
    retry_backoff_seconds: float = 0.5
    """First retry delay (seconds, >= 0); doubles on each further attempt."""


MAX_SEAM_SAMPLES = 4096
"""Largest ``[checks] seam_samples``: each block keeps four seam tables of this many samples
per channel (float64) until its neighbours are compared, outside the memory budget; a seam
mismatch shows within a few samples of the edge."""


@dataclass(frozen=True)
class ChecksConfig:
    """Per-block checks and their thresholds."""

    every: int = 1
    """Run the response checks on every Nth block (1 = all, 0 = off). Integrity checks
    always run, and seam checks unless ``seam_samples = 0``."""
    seam_samples: int = 8
    """Samples (0 to :data:`MAX_SEAM_SAMPLES`) computed beyond each block edge and compared
    with the neighbour; 0 turns the seam check off."""
    passband_warn_db: float = 0.5
    """dB (>= 0) added to the passband allowance (half the overall ``passband_ripple_db``
    plus the estimator's 0.3 dB): a block's passband deviation beyond the sum warns (1.3 dB
    for a 1 dB ripple); at most ``passband_fail_db``."""
    passband_fail_db: float = 1.0
    """dB (>= 0) added to the same allowance for failing (1.8 dB for a 1 dB ripple): a correct
    filter's figures stay within the ripple and estimator allowances, so a gain error of a
    dB or two in the passband (a processing fault) fails rather than warns."""
    phase_warn_deg: float = 5.0
    """Passband phase magnitude (degrees, >= 0) that warns; at most ``phase_fail_deg``."""
    phase_fail_deg: float = 20.0
    """Passband phase magnitude (degrees, >= 0) that fails."""
    stopband_margin_db: float = 10.0
    """How far (dB, >= 0) the measured stopband attenuation may fall short of the spec (of
    ``twinpass.core.checks.REJECTION_DB`` for designs that state none) before failing."""
    coherence_min: float = 0.9
    """Frequency bins below this coherence (in [0, 1]) are not used by the response check."""


@dataclass(frozen=True)
class FlowConfig:
    """Prefect settings: one task per segment; its retries rerun only unfinished blocks, and a
    segment whose only failures are failed checks is not retried (the same blocks give the
    same figures)."""

    retries: int = 1
    """Retries of a failing segment task (>= 0)."""
    retry_delay_seconds: float = 5.0
    """Delay (seconds, >= 0) before the first retry of a segment task; later retries back off (x2, x4...)."""


@dataclass(frozen=True)
class JobConfig:
    """A whole job: what to filter, how, and where to write."""

    response: ResponseSpec
    processing: ProcessingConfig = field(default_factory=ProcessingConfig)
    archive: ArchiveConfig = field(default_factory=ArchiveConfig)
    output: OutputConfig = field(default_factory=OutputConfig)
    engine: EngineConfig = field(default_factory=EngineConfig)
    checks: ChecksConfig = field(default_factory=ChecksConfig)
    flow: FlowConfig = field(default_factory=FlowConfig)
    base_dir: Path = Path(".")
    """Folder of the configuration file; relative paths resolve against it."""
    source: str = "<memory>"
    """Where the configuration came from (for messages)."""
    text: str = ""
    """The TOML text as read (kept for provenance and the saved-configuration block)."""

    # -- derived paths -------------------------------------------------
    @property
    def archive_root(self) -> Path:
        return _resolve(self.base_dir, self.archive.root)

    @property
    def store_location(self) -> str:
        """Absolute local path or the fsspec URL of the output store."""
        s = self.output.store
        if "://" in s:
            return s
        return str(_resolve(self.base_dir, s))

    @property
    def manifest_path(self) -> Path | None:
        return None if self.archive.manifest is None else _resolve(self.base_dir, self.archive.manifest)

    def digest(self) -> str:
        """SHA-256 of the validated settings (not of comments or layout)."""
        return hashlib.sha256(json.dumps(self.to_dict(), sort_keys=True).encode()).hexdigest()

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {}
        for name in ("response", "processing", "archive", "output", "engine", "checks", "flow"):
            obj = getattr(self, name)
            out[name] = {k: (list(v) if isinstance(v, tuple) else v) for k, v in dataclasses.asdict(obj).items()}
        return out


def _resolve(base: Path, p: str) -> Path:
    path = Path(p).expanduser()
    return path if path.is_absolute() else (base / path).resolve()


_SECTIONS: dict[str, type] = {
    "response": ResponseSpec,
    "processing": ProcessingConfig,
    "archive": ArchiveConfig,
    "output": OutputConfig,
    "engine": EngineConfig,
    "checks": ChecksConfig,
    "flow": FlowConfig,
}

_CHOICES: dict[tuple[str, str], tuple[str, ...]] = {
    ("response", "kind"): KINDS,
    ("response", "family"): FAMILIES,
    ("response", "cutoff_means"): ("overall-3db", "per-pass"),
    ("processing", "edge"): EDGE_MODES,
    ("processing", "mode"): ("auto", "halo", "carry"),
    ("processing", "nonfinite"): ("fail", "split", "interpolate"),
    ("archive", "fingerprint"): ("fast", "full"),
    ("archive", "truncated"): ("error", "warn"),
    ("archive", "wrapped_sizes"): ("error", "read"),
    ("output", "dtype"): ("float32", "float64"),
    ("output", "compression"): ("none", "lz4", "zstd"),
}


def _type_name(tp: Any) -> str:
    return getattr(tp, "__name__", str(tp))


_ELEMENT_NAMES: dict[Any, tuple[str, str]] = {float: ("a number", "numbers"), int: ("a whole number", "whole numbers"),
                                              str: ("a string", "strings")}
"""How an error names one value of a list key, and several."""
_UNITS = {"hz": "Hz", "db": "dB", "seconds": "s"}
"""Units of keys by the end of their name (``passband_hz``), named in the errors."""


def _coerce(where: str, value: Any, tp: Any) -> Any:
    """Check ``value`` against the annotation ``tp``; return it normalised (lists -> tuples)."""
    origin = get_origin(tp)
    args = get_args(tp)
    if origin is None and tp is Any:
        return value
    if origin in (type(int | None),) or (origin is not None and str(origin) == "typing.Union"):
        errors = []
        for a in args:
            if a is type(None):
                if value is None:
                    return None
                continue
            try:
                return _coerce(where, value, a)
            except ConfigError as e:
                errors.append(str(e))
        if len(errors) == 1:  # one type besides None: its own message says what is expected
            raise ConfigError(errors[0])
        names = " or ".join(_type_name(a) for a in args if a is not type(None))
        raise ConfigError(f"{where}: expected {names}, got {value!r}")
    if origin is tuple:
        elem = args[0] if args else Any
        if not isinstance(value, (list, tuple)):
            # One value where a list is expected is a list of one (``cutoff_hz = 10.0`` for a
            # low-pass, ``include = "**/*.wav"``); anything else is refused naming both forms.
            if elem is not Any and len(args) == 2 and args[1] is Ellipsis:
                try:
                    return (_coerce(where, value, elem),)
                except ConfigError:
                    one, many = _ELEMENT_NAMES.get(elem, (_type_name(elem), f"{_type_name(elem)} values"))
                    unit = _UNITS.get(where.rsplit("_", 1)[-1])
                    unit = f" ({unit})" if unit else ""
                    raise ConfigError(f"{where}: expected {one}{unit} or a list of {many}{unit}, "
                                      f"got {value!r}") from None
            raise ConfigError(f"{where}: expected a list, got {value!r}")
        return tuple(_coerce(f"{where}[{i}]", v, elem) for i, v in enumerate(value))
    if tp is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"{where}: expected a number, got {value!r}")
        return float(value)
    if tp is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"{where}: expected a whole number, got {value!r}")
        return value
    if tp is str:
        if not isinstance(value, str):
            raise ConfigError(f"{where}: expected a string, got {value!r}")
        return value
    if tp is bool:
        if not isinstance(value, bool):
            raise ConfigError(f"{where}: expected true or false, got {value!r}")
        return value
    return value


def parse_response(table: Any, source: str) -> ResponseSpec:
    """A ``[response]`` table (as ``ResponseSpec.to_dict()`` gives one) read with the same
    key and type checks as a configuration file; ``source`` names where it came from.

    Raises
    ------
    ConfigError
        Naming ``source``, the table and the key.
    """
    return _section(source, "response", table, ResponseSpec)


def _section(source: str, name: str, table: Any, cls: type) -> Any:
    if not isinstance(table, Mapping):
        raise ConfigError(f"{source}: [{name}] must be a table")
    hints = get_type_hints(cls)
    known = {f.name for f in dataclasses.fields(cls)}
    unknown = sorted(set(table) - known)
    if unknown:
        raise ConfigError(
            f"{source}: unknown key(s) {', '.join(unknown)} in [{name}]; "
            f"known keys are: {', '.join(sorted(known))}"
        )
    kwargs: dict[str, Any] = {}
    for key, value in table.items():
        where = f"{source}: [{name}] {key}"
        parse = _TABLE_PARSERS.get((name, key))
        v = parse(source, value) if parse is not None else _coerce(where, value, hints[key])
        choices = _CHOICES.get((name, key))
        if choices is not None and v not in choices:
            raise ConfigError(f"{where} = {v!r} is not one of: {', '.join(choices)}")
        kwargs[key] = v
    return cls(**kwargs)


_CHANNEL_KEYS = ("names", "units")


def _label_list(where: str, value: Any, what: str, example: str) -> tuple[str, ...]:
    """A non-empty list of non-empty strings (``what``: "name" or "unit") at ``where``."""
    if not isinstance(value, list):
        raise ConfigError(f"{where}: expected a list of strings, one {what} per channel, e.g. {example}; "
                          f"got {value!r}")
    if not value:
        raise ConfigError(f"{where} is an empty list; give one {what} per channel, e.g. {example}, or leave "
                          "the key out")
    for i, v in enumerate(value):
        if not isinstance(v, str):
            raise ConfigError(f"{where}[{i}]: expected a string, got {v!r}; give one {what} per channel, "
                              f"e.g. {example}")
        if not v.strip():
            raise ConfigError(f"{where}[{i}] is empty; give channel {i + 1} a {what}, e.g. {example}")
    return tuple(value)


def _parse_channels(source: str, table: Any) -> tuple[StreamChannels, ...]:
    """``[archive.channels]``: a table per stream (or ``"*"``) with ``names`` and ``units``.

    Raises
    ------
    ConfigError
        Naming ``source``, the stream's table and the key, and what to give instead.
    """
    names_eg, units_eg = '["vertical", "lateral"]', '["m/s^2", "V"]'
    if not isinstance(table, Mapping):
        raise ConfigError(f'{source}: [archive] channels must be a table of streams, e.g. '
                          f'[archive.channels."mast-top"] with names = {names_eg} and units = "m/s^2" '
                          f'(the stream "{CHANNELS_ANY_STREAM}" for every stream); got {table!r}')
    out = []
    for stream, entry in table.items():
        where = f"{source}: [archive.channels.{json.dumps(stream)}]"
        if not stream.strip():
            raise ConfigError(f"{where}: the stream name is empty; name a stream, or \"{CHANNELS_ANY_STREAM}\" "
                              "for every stream")
        if not isinstance(entry, Mapping):
            raise ConfigError(f"{where} must be a table with names and/or units, e.g. names = {names_eg}; "
                              f"got {entry!r}")
        unknown = sorted(set(entry) - set(_CHANNEL_KEYS))
        if unknown:
            raise ConfigError(f"{where}: unknown key(s) {', '.join(unknown)}; known keys are: "
                              f"{', '.join(_CHANNEL_KEYS)}")
        if not entry:
            raise ConfigError(f"{where} gives neither names nor units; give names = {names_eg} and/or "
                              'units = "m/s^2", or remove the table')
        names = None
        if "names" in entry:
            names = _label_list(f"{where} names", entry["names"], "name", names_eg)
            seen: dict[str, int] = {}
            for i, n in enumerate(names):
                if n in seen:
                    raise ConfigError(f"{where} names: {n!r} is given twice (channels {seen[n] + 1} and "
                                      f"{i + 1}); give each channel its own name")
                seen[n] = i
        units: str | tuple[str, ...] | None = None
        if "units" in entry:
            value = entry["units"]
            if isinstance(value, str):
                if not value.strip():
                    raise ConfigError(f'{where} units is empty; give a unit, e.g. "m/s^2", or leave the key out')
                units = value
            else:
                if not isinstance(value, list):
                    raise ConfigError(f'{where} units: expected a string (one unit for every channel, e.g. '
                                      f'"m/s^2") or a list of strings (one per channel, e.g. {units_eg}); '
                                      f"got {value!r}")
                units = _label_list(f"{where} units", value, "unit", units_eg)
        out.append(StreamChannels(stream, names, units))
    return tuple(out)


_TABLE_PARSERS: dict[tuple[str, str], Callable[[str, Any], Any]] = {
    ("archive", "channels"): _parse_channels,
}
"""Keys whose value is a table of its own, read by their own parser instead of :func:`_coerce`."""


def _nonfinite_setting(cfg: JobConfig) -> tuple[str, str, Any] | None:
    """The first setting (table, key, value) holding a NaN or infinite number, if any.

    Every number in the configuration (times in seconds, sizes in MiB, levels in dB,
    ratios) is a finite quantity: NaN compares false with every limit, so it would slip
    through the range checks below and poison the run.
    """
    for table in _SECTIONS:
        obj = getattr(cfg, table)
        for f in dataclasses.fields(obj):
            value = getattr(obj, f.name)
            items = value if isinstance(value, tuple) else (value,)
            if any(isinstance(v, float) and not math.isfinite(v) for v in items):
                return table, f.name, value
    return None


SCHEDULER_ADVICE = "use threads, processes or an address like tcp://127.0.0.1:8786"
"""What to give for a Dask scheduler (``[engine] scheduler``, ``--scheduler``) that is not one."""


def scheduler_usable(value: str) -> bool:
    """Whether ``value`` names a Dask scheduler twinpass can use: ``threads``, ``processes``
    or an address (``tcp://HOST:PORT`` and the like: anything with ``://``)."""
    return value in ("threads", "processes") or "://" in value


def check_run_overrides(scheduler: str | None, workers: int | None) -> None:
    """Refuse a run's ``scheduler`` and ``workers`` overrides (of ``[engine]``; None keeps
    the configured value) that cannot run, before the run takes the store's lock or
    records anything.

    Raises
    ------
    ConfigError
        Naming the override and what to give instead.
    """
    if scheduler is not None and not scheduler_usable(scheduler):
        raise ConfigError(f"scheduler {scheduler!r}: {SCHEDULER_ADVICE}")
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int) or workers < 1):
        raise ConfigError(f"workers {workers!r}: give a whole number of at least 1 (local Dask workers)")


def _require(src: str, table: str, key: str, value: Any, ok: bool, rule: str) -> None:
    """Raise a :class:`ConfigError` naming ``[table] key`` and ``rule`` (what to give) unless ``ok``."""
    if not ok:
        raise ConfigError(f"{src}: [{table}] {key} = {value!r} {rule}")


def _check_ranges(cfg: JobConfig) -> None:
    """Ranges of the settings whose values outside them are meaningless, or crash or poison
    the run (every block failing its checks without a hint); see the settings' docstrings."""
    src, c, fl = cfg.source, cfg.checks, cfg.flow
    _require(src, "processing", "carry_threshold", cfg.processing.carry_threshold,
             cfg.processing.carry_threshold > 0, "must be > 0 (halo length / block length above which "
             "mode = \"auto\" carries filter states), e.g. 1.0; to carry always or never, set "
             "mode = \"carry\" or \"halo\" instead")
    rate = cfg.archive.sample_rate_hz
    _require(src, "archive", "sample_rate_hz", rate, rate is None or rate > 0,
             "must be > 0 (Hz), the sample rate of the recordings that store none")
    _require(src, "archive", "max_channels", cfg.archive.max_channels, cfg.archive.max_channels >= 1,
             "must be >= 1 (the most channels a recording may have)")
    _require(src, "engine", "retry_backoff_seconds", cfg.engine.retry_backoff_seconds,
             cfg.engine.retry_backoff_seconds >= 0, "must be >= 0 (seconds before the first retry of a block)")
    _require(src, "flow", "retries", fl.retries, fl.retries >= 0, "must be >= 0 (0 = no retries of a segment)")
    _require(src, "flow", "retry_delay_seconds", fl.retry_delay_seconds, fl.retry_delay_seconds >= 0,
             "must be >= 0 (seconds before the first retry of a segment)")
    _require(src, "checks", "seam_samples", c.seam_samples, 0 <= c.seam_samples <= MAX_SEAM_SAMPLES,
             f"must be in [0, {MAX_SEAM_SAMPLES}] (samples compared beyond each block edge; 0 turns the seam "
             "check off), e.g. 8")
    _require(src, "checks", "coherence_min", c.coherence_min, 0.0 <= c.coherence_min <= 1.0,
             "must be in [0, 1] (a coherence), e.g. 0.9")
    _require(src, "checks", "stopband_margin_db", c.stopband_margin_db, c.stopband_margin_db >= 0,
             "must be >= 0 (dB the measured stopband attenuation may fall short of the spec)")
    # grade(): a block warns above the warn threshold and fails above the fail threshold, so
    # both are allowances >= 0 and the warning comes first (or with the failure, when equal).
    for quantity, unit in (("passband", "db"), ("phase", "deg")):
        warn_key, fail_key = f"{quantity}_warn_{unit}", f"{quantity}_fail_{unit}"
        warn, fail = getattr(c, warn_key), getattr(c, fail_key)
        for key, value in ((warn_key, warn), (fail_key, fail)):
            _require(src, "checks", key, value, value >= 0,
                     f"must be >= 0 ({'dB' if unit == 'db' else 'degrees'} of {quantity} deviation allowed)")
        _require(src, "checks", warn_key, warn, warn <= fail,
                 f"must not exceed {fail_key} = {fail!r}: a block warns above the first and fails above "
                 "the second; lower the warn threshold or raise the fail threshold")


def _check_values(cfg: JobConfig) -> None:
    src = cfg.source
    bad = _nonfinite_setting(cfg)
    if bad is not None:
        table, key, value = bad
        raise ConfigError(f"{src}: [{table}] {key} = {value!r} is not a finite number; give a finite value "
                          "(or leave the key out for its default)")
    p = cfg.processing
    if not (0.0 < p.tolerance < 1e-1):
        raise ConfigError(f"{src}: [processing] tolerance = {p.tolerance!r} must be in (0, 0.1), e.g. 1e-9")
    if isinstance(p.edge_samples, str) and p.edge_samples != "auto":
        raise ConfigError(f"{src}: [processing] edge_samples = {p.edge_samples!r}: use \"auto\" or a whole number")
    if isinstance(p.edge_samples, int) and p.edge_samples < 0:
        raise ConfigError(f"{src}: [processing] edge_samples must be >= 0")
    if p.block_seconds is not None and p.block_seconds <= 0:
        raise ConfigError(f"{src}: [processing] block_seconds must be > 0")
    if p.memory_budget_mib <= 0:
        raise ConfigError(f"{src}: [processing] memory_budget_mib must be > 0")
    if cfg.engine.workers < 1:
        raise ConfigError(f"{src}: [engine] workers must be >= 1")
    if cfg.engine.retries < 0:
        raise ConfigError(f"{src}: [engine] retries must be >= 0")
    sch = cfg.engine.scheduler
    if not scheduler_usable(sch):
        raise ConfigError(f"{src}: [engine] scheduler = {sch!r}: {SCHEDULER_ADVICE}")
    if cfg.checks.every < 0:
        raise ConfigError(f"{src}: [checks] every must be >= 0 (0 turns response checks off)")
    _check_ranges(cfg)
    if cfg.output.chunk_seconds is not None and cfg.output.chunk_seconds <= 0:
        raise ConfigError(f"{src}: [output] chunk_seconds must be > 0")
    if p.max_fill_samples < 0:
        raise ConfigError(f"{src}: [processing] max_fill_samples must be >= 0")
    if p.mode == "carry" and cfg.response.family == "fir":
        raise ConfigError(
            f"{src}: [processing] mode = \"carry\" needs an IIR design, but [response] family = \"fir\": an FIR "
            "filter has no recursive state to carry between blocks; use mode = \"auto\" or \"halo\", or an IIR "
            "family (butterworth, chebyshev1, chebyshev2, elliptic)"
        )
    if p.nonfinite == "interpolate" and p.max_fill_samples == 0:
        raise ConfigError(
            f"{src}: [processing] nonfinite = \"interpolate\" needs max_fill_samples > 0 "
            "(the longest NaN/Inf run to fill, in samples)"
        )
    # The response must make sense before any sample rate is known; the Nyquist check
    # waits for the archive's rates.
    from .core.design import validate_spec_without_rate
    from .errors import SpecError

    try:
        validate_spec_without_rate(cfg.response)
    except SpecError as e:
        raise ConfigError(f"{src}: [response] {e}") from None


def parse_config(text: str, *, base_dir: Path | str = ".", source: str = "<memory>") -> JobConfig:
    """Parse and validate TOML ``text``. Raises :class:`ConfigError` naming the key."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise ConfigError(f"{source}: not valid TOML: {e}") from None
    unknown = sorted(set(data) - set(_SECTIONS))
    if unknown:
        raise ConfigError(
            f"{source}: unknown table(s) {', '.join('[' + u + ']' for u in unknown)}; "
            f"known tables are: {', '.join('[' + s + ']' for s in _SECTIONS)}"
        )
    if "response" not in data:
        raise ConfigError(f"{source}: missing [response] table (what the overall filter must do)")
    parts = {name: _section(source, name, data[name], cls) for name, cls in _SECTIONS.items() if name in data}
    cfg = JobConfig(**parts, base_dir=Path(base_dir).resolve(), source=source, text=text)
    _check_values(cfg)
    return cfg


def load_config(path: str | Path) -> JobConfig:
    """Read and validate the TOML configuration at ``path``."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{p}: configuration file not found") from None
    except OSError as e:
        raise ConfigError(f"{p}: cannot read the configuration: {e.strerror}") from None
    return parse_config(text, base_dir=p.resolve().parent, source=str(p))
