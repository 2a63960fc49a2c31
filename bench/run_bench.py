"""Benchmark twinpass against the hand-written baseline, on one archive, in one run.

Usage::

    python bench/run_bench.py [--size 2GiB | --quick] [--only SECTION ...]
                              [--workdir /tmp/twinpass-bench] [--out bench/results/latest.json]

Sections (all by default, in this order):

``baseline``  per file: load whole, ``scipy.signal.sosfiltfilt``, save ``.npy`` (subprocess)
``engine``    ``twinpass run CONFIG --no-flow --force --no-report``: threads and processes,
              1 and 2 workers, each into a new store; then one forced rerun over the store
              just written (chunks overwritten in place)
``checks``    the engine with ``[checks] every = 1`` and ``every = 0`` (response checks off),
              in alternating pairs (``--repeat``)
``flow``      ``twinpass run CONFIG --force --no-report`` (through the Prefect flow), into a
              new store
``rerun``     unchanged archive (engine, flow, and an in-process breakdown), then a rerun
              after changing one file (engine and flow)
``small``     a separate archive of 1,000 small NPY files: the baseline, a first run into
              a new store, unchanged reruns (engine, flow, and in process with discovery
              + hashing timed apart from the rest)
``halo``      window samples / core samples from the block layout and halos

Every throughput run of twinpass writes a new store (the previous run's store is deleted
first), as a first run over an archive does and as the baseline writes new files; every
timed run starts after ``sync``, so that no earlier run's writes are flushed during it.
Every timed run is a subprocess; its peak RSS is the largest sum of RSS over the process
and all its descendants, polled every ``POLL_S`` seconds. CPU seconds come from
``wait4`` (the process and the descendants it reaped). Throughput counts samples as
frames x channels. Figures are compared with the baseline measured in the same run (the
fastest of its runs: the main design's baseline runs ``--repeat`` times).

Results: a table on stdout, JSON at ``--out`` and the same table as markdown beside it
(``.md``).
"""

from __future__ import annotations

import argparse
import datetime as _dt
import functools
import json
import os
import platform
import shutil
import subprocess
import sys
import time
from collections import defaultdict
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Callable

import psutil

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import make_archive  # noqa: E402  (bench/ is not a package)

DEFAULT_SIZE = "2GiB"
"""Default archive size. From scratch, the whole matrix on 2 GiB took about 20 min on a
2-core machine with light other load; use ``--size 1GiB`` (about 12 min) on a busy one."""
POLL_S = 0.05
"""Interval of the RSS poll (s)."""
SECTIONS = ("baseline", "engine", "checks", "flow", "rerun", "small", "halo")
DESIGNS = ("bp4", "ell8")
"""bp4: Butterworth band-pass, 4 sections; ell8: elliptic band-pass, 8 sections."""
MAIN = "bp4"
"""The design every section measures; ``ell8`` gets the baseline, engine and flow runs."""
RUN_TIMEOUT_S = 3600
MiB = 2**20


# --------------------------------------------------------------------------- measuring
@dataclass
class Measured:
    """One timed subprocess."""

    label: str
    cmd: list[str]
    wall_s: float = 0.0
    cpu_s: float = 0.0
    """User + system CPU seconds of the process and the descendants it reaped."""
    sys_s: float = 0.0
    """The system (kernel) part of ``cpu_s``: page faults, file I/O."""
    peak_rss: int = 0
    """Largest sum of RSS over the process tree (bytes)."""
    max_single_rss: int = 0
    """Largest RSS of any one process of the tree (bytes)."""
    cpu_by_role: dict[str, float] = field(default_factory=dict)
    """CPU seconds per role as last seen by the poll (misses the last ``POLL_S``)."""
    peak_rss_by_role: dict[str, int] = field(default_factory=dict)
    """Largest summed RSS per role: main (the command's own process), prefect-server,
    dask-workers (spawned worker processes), other (bytes)."""
    rc: int | None = None
    samples: int = 0
    """Samples (frames x channels) the run processed; 0 when not a throughput run."""
    blocks_run: int | None = None
    load_before: float = 0.0
    load_after: float = 0.0
    """1-minute load average before and after the run (other work on the machine)."""
    stdout_tail: str = ""
    stderr_tail: str = ""
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def rate(self) -> float | None:
        """Samples per wall second."""
        return self.samples / self.wall_s if self.samples and self.wall_s > 0 and self.rc == 0 else None

    @property
    def cpu_rate(self) -> float | None:
        """Samples per CPU second (less sensitive to other load on the machine)."""
        return self.samples / self.cpu_s if self.samples and self.cpu_s > 0 and self.rc == 0 else None


def _role(p: psutil.Process, root: int, cache: dict[int, str]) -> str:
    if p.pid not in cache:
        try:
            cmd = " ".join(p.cmdline())
        except psutil.Error:
            cmd = ""
        if p.pid == root:
            cache[p.pid] = "main"
        elif "uvicorn" in cmd or ("prefect" in cmd and "server" in cmd):
            cache[p.pid] = "prefect-server"
        elif "multiprocessing" in cmd or "distributed" in cmd:
            cache[p.pid] = "dask-workers"
        else:
            cache[p.pid] = "other"
    return cache[p.pid]


class TreePoller:
    """RSS and CPU time of a process and its descendants.

    Each :meth:`poll` reads the known processes; the tree itself is listed again every
    ``REFRESH`` polls (listing scans /proc and costs far more than reading a process).
    """

    REFRESH = 10

    def __init__(self, pid: int) -> None:
        self.root = psutil.Process(pid)
        self.procs: dict[int, psutil.Process] = {pid: self.root}
        self.roles: dict[int, str] = {}
        self.cpu: dict[int, tuple[str, float]] = {}
        """pid -> (role, user + system CPU seconds last seen)."""
        self.polls = 0

    def poll(self) -> tuple[int, int, dict[str, int]]:
        """(sum of RSS over the tree, largest single RSS, sum per role), bytes."""
        if self.polls % self.REFRESH == 0:
            try:
                for c in self.root.children(recursive=True):
                    self.procs.setdefault(c.pid, c)
            except psutil.Error:
                pass
        self.polls += 1
        total = single = 0
        roles: dict[str, int] = defaultdict(int)
        for pid, p in list(self.procs.items()):
            try:
                with p.oneshot():
                    rss = p.memory_info().rss
                    t = p.cpu_times()
            except psutil.Error:
                del self.procs[pid]
                continue
            role = _role(p, self.root.pid, self.roles)
            total += rss
            single = max(single, rss)
            roles[role] += rss
            self.cpu[pid] = (role, t.user + t.system)
        return total, single, roles


def measure(label: str, cmd: list[str], *, env: dict[str, str], logs: Path, samples: int = 0,
            timeout: float = RUN_TIMEOUT_S, cwd: Path | None = None) -> Measured:
    """Run ``cmd``, polling the RSS of its process tree every ``POLL_S`` seconds."""
    logs.mkdir(parents=True, exist_ok=True)
    out_path, err_path = logs / f"{label}.out", logs / f"{label}.err"
    # What an earlier run left unwritten (the baseline does not sync its files) must not be
    # written back during this one.
    if hasattr(os, "sync"):
        os.sync()
    m = Measured(label, [str(c) for c in cmd], samples=samples, load_before=os.getloadavg()[0])
    print(f"[{time.strftime('%H:%M:%S')}] {label}: {' '.join(m.cmd[1:])}", flush=True)
    with open(out_path, "wb") as out, open(err_path, "wb") as err:
        t0 = time.perf_counter()
        p = subprocess.Popen(m.cmd, stdout=out, stderr=err, env=env, cwd=cwd)
        poller = TreePoller(p.pid)
        status = None
        rusage = None
        while True:
            total, single, roles = poller.poll()
            m.peak_rss = max(m.peak_rss, total)
            m.max_single_rss = max(m.max_single_rss, single)
            for k, v in roles.items():
                m.peak_rss_by_role[k] = max(m.peak_rss_by_role.get(k, 0), v)
            pid, status, rusage = os.wait4(p.pid, os.WNOHANG)
            if pid:
                break
            if time.perf_counter() - t0 > timeout:
                p.kill()
                _, status, rusage = os.wait4(p.pid, 0)
                break
            time.sleep(POLL_S)
        m.wall_s = time.perf_counter() - t0
        p.returncode = os.waitstatus_to_exitcode(status)
    m.rc = p.returncode
    m.cpu_s = rusage.ru_utime + rusage.ru_stime
    m.sys_s = rusage.ru_stime
    for role, c in poller.cpu.values():
        m.cpu_by_role[role] = m.cpu_by_role.get(role, 0.0) + c
    m.load_after = os.getloadavg()[0]
    stdout = out_path.read_text(errors="replace")
    m.stdout_tail = stdout[-2000:]
    m.stderr_tail = err_path.read_text(errors="replace")[-3000:]
    for line in stdout.splitlines():
        if "blocks run" in line:
            try:
                m.blocks_run = int(line.rsplit("blocks run", 1)[1].strip())
            except ValueError:
                pass
    rate = f", {m.rate / 1e6:.1f} Msamples/s" if m.rate else ""
    print(f"    rc {m.rc}, {m.wall_s:.1f} s wall, {m.cpu_s:.1f} s CPU, peak RSS {m.peak_rss / MiB:.0f} MiB"
          f"{rate}" + ("" if m.blocks_run is None else f", blocks run {m.blocks_run}"), flush=True)
    if m.rc != 0:
        print("    stderr: " + m.stderr_tail[-800:].replace("\n", "\n    "), flush=True)
    return m


# ----------------------------------------------------------------------- machine info
def compile_twinpass() -> None:
    """Byte-compile twinpass's modules, as ``pip install`` does for an installed copy.

    An editable install run with ``PYTHONDONTWRITEBYTECODE`` set (common in containers)
    would otherwise compile them from source in every measured process (about 0.1 s each).
    """
    import compileall

    import twinpass

    compileall.compile_dir(str(Path(twinpass.__file__).parent), quiet=1)


def machine_info() -> dict[str, Any]:
    """CPU model, cores, RAM, Python and library versions."""
    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    from twinpass.job import library_versions

    return {
        "cpu": cpu,
        "logical_cores": os.cpu_count(),
        "physical_cores": psutil.cpu_count(logical=False),
        "ram_gib": round(psutil.virtual_memory().total / 2**30, 1),
        "platform": platform.platform(),
        "versions": library_versions(),
        "OPENBLAS_CORETYPE": os.environ.get("OPENBLAS_CORETYPE"),
        "load_average_at_start": os.getloadavg(),
    }


# ---------------------------------------------------------------------- the probes
def probe_rerun(config: str) -> dict[str, Any]:
    """In this process: ``run_job`` on ``config`` (no force), with its phases timed.

    ``discover_s`` covers listing, opening every file and hashing it; ``hash_s`` is the
    hashing alone, as CPU seconds summed over the threads that hash (discovery hashes on
    several threads, so wall time inside each call would count waits for the others);
    ``rest_s`` is everything else of ``run_job`` (store lock, reading the store's records,
    planning, provenance).
    """
    t0 = time.perf_counter()
    import twinpass.io.archive as archive
    import twinpass.job as job
    from twinpass.config import load_config
    from twinpass.io.store import OutputStore

    t_import = time.perf_counter() - t0
    acc: dict[str, float] = defaultdict(float)

    def timed(owner: Any, name: str, key: str, thread_cpu: bool = False) -> None:
        fn = getattr(owner, name, None)
        if fn is None:
            return

        @functools.wraps(fn)
        def wrapper(*a: Any, **k: Any) -> Any:
            t = time.thread_time() if thread_cpu else time.perf_counter()
            c = time.thread_time() if thread_cpu else time.process_time()
            try:
                return fn(*a, **k)
            finally:
                acc[key] += (time.thread_time() if thread_cpu else time.perf_counter()) - t
                acc[key.replace("_s", "_cpu_s")] += (time.thread_time() if thread_cpu else time.process_time()) - c

        setattr(owner, name, wrapper)

    timed(job, "discover", "discover_s")
    timed(archive, "fingerprint_file", "hash_s", thread_cpu=True)
    timed(OutputStore, "file_records", "store_records_s")
    timed(job, "make_plan", "plan_s")
    cfg = load_config(config)
    t, c = time.perf_counter(), time.process_time()
    res = job.run_job(cfg)
    total, cpu = time.perf_counter() - t, time.process_time() - c
    return {"import_s": t_import, "run_job_s": total, "run_job_cpu_s": cpu, **acc,
            "rest_s": total - acc["discover_s"], "rest_cpu_s": cpu - acc["discover_cpu_s"],
            "without_hashing_s": total - acc["hash_s"], "without_hashing_cpu_s": cpu - acc["hash_cpu_s"],
            "files": len(res.outcomes), "counts": res.counts(), "load_average": os.getloadavg()}


def _halo_of(config: Path) -> dict[str, Any]:
    """Window samples / core samples over every block the engine would run for ``config``."""
    from twinpass.config import load_config
    from twinpass.core.blocks import choose_layout
    from twinpass.core.kernel import block_window
    from twinpass.engine import segment_block_samples, segment_edge_samples
    from twinpass.errors import ConfigError
    from twinpass.job import prepare

    class NoRecords:
        def file_records(self) -> dict[str, Any]:
            return {}

    try:
        from twinpass.engine_carry import use_carry
    except ImportError:  # an engine without the state-carrying mode
        def use_carry(*_a: Any) -> bool:
            return False

    cfg = load_config(config)
    prep = prepare(cfg, NoRecords(), force=True)
    core = window = blocks = 0
    layouts: dict[str, Any] = {}
    k = cfg.checks.seam_samples
    for w in prep.work:
        d = prep.designs[w.sample_rate_hz]
        # The engine's own choice (engine.run_segment): carry mode has no halos; it also takes
        # a segment whose blocks with halos do not fit the memory budget.
        may_carry = cfg.processing.mode != "halo" and not getattr(w, "holes", ())
        try:
            lay = choose_layout(sample_rate_hz=w.sample_rate_hz, channels=w.channels, halo=d.effective_length,
                                block_seconds=cfg.processing.block_seconds, chunk_seconds=cfg.output.chunk_seconds,
                                memory_budget_mib=cfg.processing.memory_budget_mib,
                                seam_samples=cfg.checks.seam_samples, response_checks=cfg.checks.every > 0)
        except ConfigError:
            if not may_carry or (d.is_fir and cfg.processing.mode == "auto"):
                raise
            lay = None
        carry = lay is None or (may_carry and use_carry(d, segment_block_samples(w, lay), cfg))
        info = layouts.setdefault(f"{w.sample_rate_hz:g} Hz x {w.channels} ch", {
            "family": d.family, "order": d.order, "sections": d.n_sections, "carry_segments": 0})
        if lay is not None:
            info.update(halo=lay.halo, block_samples=lay.block_samples,
                        nominal_overhead=2 * lay.halo / lay.block_samples)
        if carry:
            info["carry_segments"] += 1
            continue
        edge = segment_edge_samples(w.frames, d, cfg)
        for f in w.files:
            for s, e in lay.spans(f.frames):
                a, b = f.seg_offset + s, f.seg_offset + e
                ws, we, _, _ = block_window(max(0, a - k), min(w.frames, b + k), w.frames, lay.halo, edge)
                core += e - s
                window += we - ws
                blocks += 1
    return {"layouts": layouts, "blocks": blocks, "core_samples": core, "window_samples": window,
            "overhead": window / core - 1 if core else None}


def probe_halo(configs: list[str]) -> dict[str, Any]:
    return {c: _halo_of(Path(c)) for c in configs}


# ------------------------------------------------------------------------- the bench
class Bench:
    def __init__(self, args: argparse.Namespace) -> None:
        self.args = args
        self.work = Path(args.workdir).resolve()
        self.logs = self.work / "logs"
        self.py = sys.executable
        self.runs: dict[str, Measured] = {}
        self.notes: list[str] = []
        self.probes: dict[str, Any] = {}
        self.env = dict(os.environ)
        self.env.setdefault("PREFECT_HOME", str(self.work / "prefect-home"))
        self.env["PYTHONUNBUFFERED"] = "1"
        self.info: dict[str, Any] = {}
        self.small_info: dict[str, Any] = {}

    # -- archives
    def big(self) -> Path:
        return self.work / "big"

    def ensure_archive(self) -> None:
        folder = self.big()
        want = {"size_requested": make_archive.parse_size(self.args.size), "channels": self.args.channels,
                "rate_hz": float(self.args.rate), "file_seconds": float(self.args.file_seconds)}
        info_path = folder / "archive-info.json"
        if info_path.exists():
            info = json.loads(info_path.read_text())
            if all(info.get(k) == v for k, v in want.items()) and not self.args.regenerate:
                self.info = info
                print(f"reusing archive {folder} ({info['bytes'] / 2**30:.2f} GiB, {info['files']} files)")
                return
        print(f"writing archive {folder} ({self.args.size}) ...", flush=True)
        t = time.perf_counter()
        info = make_archive.write_archive(folder, want["size_requested"], channels=self.args.channels,
                                          rate=self.args.rate, file_seconds=self.args.file_seconds)
        self.info = asdict(info)
        self.info["write_s"] = time.perf_counter() - t
        print(f"  {info.files} files, {info.bytes / 2**30:.2f} GiB, {info.samples / 1e6:.0f} Msamples "
              f"in {self.info['write_s']:.0f} s", flush=True)

    def ensure_small(self) -> Path:
        folder = self.work / "small"
        info_path = folder / "archive-info.json"
        if info_path.exists() and json.loads(info_path.read_text()).get("files") == self.args.small_files:
            self.small_info = json.loads(info_path.read_text())
        else:
            print(f"writing {self.args.small_files} small files ...", flush=True)
            self.small_info = asdict(make_archive.write_small_archive(folder, files=self.args.small_files,
                                                                      channels=self.args.channels,
                                                                      rate=self.args.rate))
            shutil.rmtree(folder / "out-small.zarr", ignore_errors=True)
        return folder / "small.toml"

    def config(self, design: str) -> Path:
        return self.big() / f"{design}.toml"

    # -- commands
    def cli(self, config: Path, *, flow: bool, force: bool = True, scheduler: str | None = None,
            workers: int | None = None) -> list[str]:
        cmd = [self.py, "-m", "twinpass.cli", "run", str(config), "--no-report"]
        if not flow:
            cmd.append("--no-flow")
        if force:
            cmd.append("--force")
        if scheduler:
            cmd += ["--scheduler", scheduler]
        if workers:
            cmd += ["--workers", str(workers)]
        return cmd

    def first_run(self, label: str, config: Path, *, flow: bool, scheduler: str | None = None,
                  workers: int | None = None, samples: int | None = None) -> Measured:
        """A throughput run: the configuration's store deleted first, so that the run writes a
        new one, as a first run over an archive does (and as the baseline writes new files).
        ``samples`` defaults to the main archive's."""
        from twinpass.config import load_config

        shutil.rmtree(load_config(config).store_location, ignore_errors=True)
        return self.run(label, self.cli(config, flow=flow, scheduler=scheduler, workers=workers),
                        self.info["samples"] if samples is None else samples)

    def save_sos(self, config: Path, rate_hz: float, name: str) -> Path:
        """The sections twinpass designs for ``config`` at ``rate_hz``, saved for the baseline."""
        import numpy as np
        from twinpass.config import load_config
        from twinpass.core.design import design_filter

        cfg = load_config(config)
        path = self.work / f"sos-{name}.npy"
        np.save(path, design_filter(cfg.response, float(rate_hz), cfg.processing.tolerance).sos)
        return path

    def run_baseline(self, label: str, sos_path: Path, archive: Path, samples: int) -> Measured:
        """The hand-written baseline over ``archive``, into an emptied output folder (removed after)."""
        out = self.work / f"baseline-out-{label}"
        shutil.rmtree(out, ignore_errors=True)
        m = self.run(label, [self.py, str(HERE / "baseline.py"), str(sos_path), str(archive), str(out)], samples)
        shutil.rmtree(out, ignore_errors=True)
        return m

    def run(self, label: str, cmd: list[str], samples: int = 0) -> Measured:
        m = measure(label, cmd, env=self.env, logs=self.logs, samples=samples)
        self.runs[label] = m
        return m

    def probe(self, kind: str, *args: str) -> Any:
        cmd = [self.py, str(Path(__file__).resolve()), f"--probe-{kind}", *args]
        r = subprocess.run(cmd, capture_output=True, text=True, env=self.env, timeout=RUN_TIMEOUT_S)
        if r.returncode != 0:
            print(r.stderr[-2000:])
            raise RuntimeError(f"probe {kind} failed (exit {r.returncode})")
        return json.loads(r.stdout.strip().splitlines()[-1])

    # -- sections
    def sec_baseline(self) -> None:
        archive, n = self.big() / "archive", self.info["samples"]
        for d in DESIGNS:
            sos_path = self.save_sos(self.config(d), self.info["rate_hz"], d)
            m = self.run_baseline(f"baseline-{d}", sos_path, archive, n)
            try:
                m.extra = json.loads(m.stdout_tail.strip().splitlines()[-1])
            except (ValueError, IndexError):
                pass
        # Other load moves wall times by 10 % or more: the main design's baseline runs as often
        # as the engine/flow pairs (--repeat), and the fastest run is the reference.
        for i in range(2, self.args.repeat + 1):
            self.run_baseline(f"baseline-{MAIN}-r{i}", self.work / f"sos-{MAIN}.npy", archive, n)

    def sec_engine(self) -> None:
        n = self.info["samples"]
        for sched in ("threads", "processes"):
            for w in (1, 2):
                self.first_run(f"engine-{MAIN}-{sched}-{w}", self.config(MAIN), flow=False, scheduler=sched,
                               workers=w)
        # A forced rerun over the store just written: block chunks are overwritten in place.
        self.run(f"engine-{MAIN}-threads-2-in-place",
                 self.cli(self.config(MAIN), flow=False, scheduler="threads", workers=2), n)
        for d in DESIGNS:
            if d != MAIN:
                self.first_run(f"engine-{d}-threads-2", self.config(d), flow=False, scheduler="threads", workers=2)

    def sec_checks(self) -> None:
        n = self.info["samples"]
        cfg = make_archive.write_config(self.big(), f"{MAIN}-nochecks", design=MAIN,
                                        store=f"out-{MAIN}-nochecks.zarr", rate=self.info["rate_hz"], every=0)
        # The response check's share of a run is smaller than the machine's drift over a few
        # minutes: run the two settings in alternating pairs (--repeat) and compare the
        # fastest of each.
        for i in range(1, self.args.repeat + 1):
            suffix = "" if i == 1 else f"-r{i}"
            self.first_run(f"engine-{MAIN}-threads-2-checks{suffix}", self.config(MAIN), flow=False,
                           scheduler="threads", workers=2)
            self.first_run(f"engine-{MAIN}-threads-2-nochecks{suffix}", cfg, flow=False, scheduler="threads",
                           workers=2)
        shutil.rmtree(self.big() / f"out-{MAIN}-nochecks.zarr", ignore_errors=True)

    def _prefect_warmup(self) -> None:
        if "prefect-warmup" in self.runs:
            return
        # The first flow in a fresh PREFECT_HOME creates its database; time it apart.
        self.run("prefect-warmup", [self.py, "-c", "import twinpass.flows\nfrom prefect import flow\n"
                                    "@flow\ndef warm():\n    return 1\nwarm()"])

    def sec_flow(self) -> None:
        n = self.info["samples"]
        self._prefect_warmup()
        for d in DESIGNS:
            if f"engine-{d}-threads-2" not in self.runs:  # the flow's overhead is measured against it
                self.first_run(f"engine-{d}-threads-2", self.config(d), flow=False, scheduler="threads", workers=2)
            self.first_run(f"flow-{d}-threads-2", self.config(d), flow=True, scheduler="threads", workers=2)
            # Other load on the machine moves wall times by more than Prefect costs: repeat
            # the pair, alternating, and compare the fastest of each.
            for i in range(2, self.args.repeat + 1 if d == MAIN else 0):
                self.first_run(f"engine-{d}-threads-2-r{i}", self.config(d), flow=False, scheduler="threads",
                               workers=2)
                self.first_run(f"flow-{d}-threads-2-r{i}", self.config(d), flow=True, scheduler="threads",
                               workers=2)

    def _files(self, stream: str) -> list[Path]:
        return sorted((self.big() / "archive" / stream).iterdir())

    def sec_rerun(self) -> None:
        cfg = self.config(MAIN)
        if not any(k.startswith(f"engine-{MAIN}") or k.startswith(f"flow-{MAIN}") for k in self.runs):
            self.first_run(f"engine-{MAIN}-threads-2", cfg, flow=False, scheduler="threads", workers=2)
        self._prefect_warmup()
        self.run(f"rerun-unchanged-engine-{MAIN}", self.cli(cfg, flow=False, force=False))
        self.run(f"rerun-unchanged-flow-{MAIN}", self.cli(cfg, flow=True, force=False))
        self.probes["rerun_unchanged_big"] = self.probe("rerun", str(cfg))
        for label, stream, flow in (("engine", make_archive.WAV_STREAMS[0], False),
                                    ("flow", make_archive.NPY_STREAMS[0], True)):
            files = self._files(stream)
            target = files[len(files) // 2]
            make_archive.perturb_file(target)
            m = self.run(f"rerun-one-changed-{label}-{MAIN}", self.cli(cfg, flow=flow, force=False))
            m.extra["changed"] = str(target.relative_to(self.big() / "archive"))

    def sec_small(self) -> None:
        cfg = self.ensure_small()
        samples = self.small_info["samples"]
        # The same hand-written baseline, on these files (each filtered on its own).
        sos_path = self.save_sos(cfg, self.small_info["rate_hz"], "small")
        self.run_baseline("small-baseline", sos_path, cfg.parent / "archive", samples)
        self.first_run("small-first-run-engine", cfg, flow=False, samples=samples)
        self.run("small-rerun-unchanged-engine", self.cli(cfg, flow=False, force=False))
        self._prefect_warmup()
        self.run("small-rerun-unchanged-flow", self.cli(cfg, flow=True, force=False))
        self.probes["rerun_unchanged_small"] = self.probe("rerun", str(cfg))
        from twinpass.io.fingerprint import fingerprint_file

        t = time.perf_counter()
        for p in sorted((cfg.parent / "archive").rglob("*.npy")):
            fingerprint_file(p)
        self.probes["small_hash_only_s"] = time.perf_counter() - t

    def sec_halo(self) -> None:
        from twinpass.demo import write_demo_archive

        demo = self.work / "demo"
        demo_cfg = demo / "twinpass.toml"
        if not demo_cfg.exists():
            write_demo_archive(demo)
        configs = [str(demo_cfg)] + [str(self.config(d)) for d in DESIGNS]
        res = self.probe("halo", *configs)
        self.probes["halo"] = {"demo": res[str(demo_cfg)], **{d: res[str(self.config(d))] for d in DESIGNS}}

    # -- derived figures
    def summary(self) -> dict[str, Any]:
        r = self.runs
        s: dict[str, Any] = {}

        def fastest(prefix: str) -> Measured | None:
            ok = [m for k, m in r.items() if (k == prefix or k.startswith(prefix + "-r")) and m.rc == 0]
            return min(ok, key=lambda m: m.wall_s) if ok else None

        def ratio(label: str, design: str) -> float | None:
            b = fastest(f"baseline-{design}")
            m = r.get(label)
            if b is None or m is None or b.rate is None or m.rate is None:
                return None
            return m.rate / b.rate

        def cpu_ratio(label: str, design: str) -> float | None:
            b, m = fastest(f"baseline-{design}"), r.get(label)
            if b is None or m is None or b.cpu_rate is None or m.cpu_rate is None:
                return None
            return m.cpu_rate / b.cpu_rate

        def design_of(label: str) -> str:
            return next((d for d in DESIGNS if f"-{d}-" in label + "-"), MAIN)

        timed = [k for k in r if k.startswith(("engine-", "flow-", "baseline-"))]
        s["throughput_ratio"] = {k: ratio(k, design_of(k)) for k in timed}
        s["cpu_efficiency_ratio"] = {k: cpu_ratio(k, design_of(k)) for k in timed}
        s["baseline_reference"] = {d: b.label for d in DESIGNS if (b := fastest(f"baseline-{d}"))}

        for d in DESIGNS:
            f, e = fastest(f"flow-{d}-threads-2"), fastest(f"engine-{d}-threads-2")
            if f and e:
                s[f"prefect_overhead_{d}"] = {"flow_run": f.label, "engine_run": e.label,
                                             "flow_s": f.wall_s, "engine_s": e.wall_s,
                                             "overhead_s": f.wall_s - e.wall_s,
                                             "share_of_flow_wall": (f.wall_s - e.wall_s) / f.wall_s,
                                             "overhead_cpu_s": f.cpu_s - e.cpu_s,
                                             "share_of_flow_cpu": (f.cpu_s - e.cpu_s) / f.cpu_s if f.cpu_s else None}
                # What that extra CPU would cost in wall time at the engine's own use of the
                # cores (CPU s per wall s): a measured overhead near it is Prefect's CPU, not
                # waiting (this process tree only: a running server's CPU is not in it).
                busy = e.cpu_s / e.wall_s if e.wall_s else 1.0
                cost = max(f.cpu_s - e.cpu_s, 0.0) / busy
                s[f"prefect_overhead_{d}"].update(engine_cores_busy=busy, cpu_cost_s=cost,
                                                  cpu_cost_share=cost / (e.wall_s + cost))
        on, off = fastest(f"engine-{MAIN}-threads-2-checks"), fastest(f"engine-{MAIN}-threads-2-nochecks")
        if on and off:
            s["checks_overhead"] = {"every_1_run": on.label, "every_0_run": off.label,
                                    "every_1_s": on.wall_s, "every_0_s": off.wall_s,
                                    "overhead": on.wall_s / off.wall_s - 1,
                                    "cpu_overhead": on.cpu_s / off.cpu_s - 1 if off.cpu_s else None}
        ip, new = r.get(f"engine-{MAIN}-threads-2-in-place"), r.get(f"engine-{MAIN}-threads-2")
        if ip and new and ip.rc == 0 and new.rc == 0:
            s["in_place_rerun"] = {"in_place_run": ip.label, "new_store_run": new.label, "in_place_s": ip.wall_s,
                                   "new_store_s": new.wall_s, "vs_new_store": ip.wall_s / new.wall_s - 1}
        peaks = {k: m.peak_rss for k, m in r.items() if k.startswith(("engine-", "flow-"))}
        if peaks:
            s["peak_rss_max_engine_or_flow_mib"] = max(peaks.values()) / MiB
        sb, sf = r.get("small-baseline"), r.get("small-first-run-engine")
        if sb and sf and sb.rc == 0 and sf.rc == 0:
            s["small_first_run"] = {"files": self.small_info.get("files"), "baseline_s": sb.wall_s,
                                    "first_run_s": sf.wall_s, "vs_baseline": sb.wall_s / sf.wall_s,
                                    "per_file_ms": 1000 * sf.wall_s / max(1, self.small_info.get("files") or 1)}
        return s

    def targets(self, s: dict[str, Any]) -> list[dict[str, Any]]:
        r = self.runs
        out = []

        def add(name: str, target: str, value: Any, met: bool | None, note: str = "") -> None:
            out.append({"target": name, "goal": target, "measured": value, "met": met, "note": note})

        def best(prefix: str) -> float | None:
            vals = [v for k, v in s["throughput_ratio"].items() if (k == prefix or k.startswith(prefix + "-r")) and v]
            return max(vals, default=None)

        ratio, eng = best(f"flow-{MAIN}-threads-2"), best(f"engine-{MAIN}-threads-2")
        add("end-to-end throughput, 2 workers", ">= 1.5x baseline",
            None if ratio is None else f"{ratio:.2f}x (flow), {eng:.2f}x (engine alone)" if eng else f"{ratio:.2f}x",
            None if ratio is None else ratio >= 1.5)
        for prefix, what in (("engine-", "engine alone"), ("flow-", "flow, incl. Prefect's server")):
            peaks = {k: m.peak_rss / MiB for k, m in r.items() if k.startswith(prefix)}
            if peaks:
                worst = max(peaks, key=peaks.get)
                add(f"peak RSS, process tree ({what})", "< 1024 MiB", f"{peaks[worst]:.0f} MiB ({worst})",
                    peaks[worst] < 1024, f"largest file {self.info.get('file_seconds', 0) * self.info.get('rate_hz', 0):.0f} frames")
        halo = self.probes.get("halo", {}).get("demo")
        if halo and halo["overhead"] is not None:
            add("halo overhead, demo design, default block", "< 10 %", f"{100 * halo['overhead']:.1f} %",
                halo["overhead"] < 0.10)
        sm = self.probes.get("rerun_unchanged_small")
        if sm:
            add(f"unchanged rerun, {sm['files']} files (run_job in process)", "< 5 s + hashing",
                f"{sm['without_hashing_s']:.2f} s + {sm['hash_s']:.2f} s hashing "
                f"(CPU {sm['without_hashing_cpu_s']:.2f} s + {sm['hash_cpu_s']:.2f} s)",
                sm["without_hashing_s"] < 5.0, "without Python start-up and imports")
            for label, what in (("small-rerun-unchanged-engine", "engine command"),
                                ("small-rerun-unchanged-flow", "flow command")):
                m = r.get(label)
                if m:
                    add(f"unchanged rerun, {sm['files']} files ({what}, whole process)", "< 5 s + hashing",
                        f"{m.wall_s - sm['hash_s']:.1f} s + {sm['hash_s']:.2f} s hashing (CPU {m.cpu_s:.1f} s)",
                        m.wall_s - sm["hash_s"] < 5.0,
                        "includes start-up" + (" and Prefect's temporary server" if "flow" in label else ""))
        po = s.get(f"prefect_overhead_{MAIN}")
        if po:
            big = self.info.get("bytes", 0) >= 1.9 * 2**30
            add(f"Prefect overhead ({self.info.get('bytes', 0) / 2**30:.2f} GiB archive)", "< 10 % of wall",
                f"{100 * po['share_of_flow_wall']:.1f} % ({po['overhead_s']:.1f} s wall, "
                f"{po['overhead_cpu_s']:.1f} s CPU, {100 * po['cpu_cost_share']:.1f} % at the engine's "
                f"{po['engine_cores_busy']:.2f} cores busy)", po["share_of_flow_wall"] < 0.10,
                "" if big else "target is stated for a 2 GiB archive; this run is smaller")
        return out


# --------------------------------------------------------------------------- output
def _fmt(v: Any, spec: str = ".1f") -> str:
    return "-" if v is None else format(v, spec)


def _by_role(values: dict[str, float], unit: float) -> str:
    return " / ".join(format(values[r] / unit, ".0f") if values.get(r) else "-"
                      for r in ("main", "prefect-server", "dask-workers"))


def tables(res: dict[str, Any]) -> str:
    runs = res["runs"]
    ratios = res["summary"].get("throughput_ratio", {})
    cpu_ratios = res["summary"].get("cpu_efficiency_ratio", {})
    lines = ["| run | wall s | CPU s (main / server / workers) | Msamples/s | vs baseline (wall) | vs baseline (per CPU s) "
             "| peak RSS MiB (main / server / workers) | blocks run | load | exit |",
             "|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|"]
    for k, m in runs.items():
        ok = m["samples"] and m["rc"] == 0
        rate = m["samples"] / m["wall_s"] / 1e6 if ok and m["wall_s"] else None
        ratio = ratios.get(k)
        cratio = cpu_ratios.get(k)
        split = _by_role(m.get("peak_rss_by_role", {}), MiB)
        lines.append(f"| {k} | {m['wall_s']:.1f} | {m['cpu_s']:.1f} ({_by_role(m.get('cpu_by_role', {}), 1.0)}) | "
                     f"{_fmt(rate)} | "
                     f"{_fmt(ratio, '.2f')}{'x' if ratio else ''} | {_fmt(cratio, '.2f')}{'x' if cratio else ''} | "
                     f"{m['peak_rss'] / MiB:.0f} ({split}) | {_fmt(m['blocks_run'], 'd')} | "
                     f"{m['load_before']:.1f} | {m['rc']} |")
    out = ["\n".join(lines)]
    s = res["summary"]
    more = []
    for d in DESIGNS:
        po = s.get(f"prefect_overhead_{d}")
        if po:
            more.append(f"| Prefect overhead, {d} (flow - engine, threads x2) | {po['overhead_s']:.1f} s = "
                        f"{100 * po['share_of_flow_wall']:.1f} % of flow wall; {po['overhead_cpu_s']:.1f} s CPU, "
                        f"{po['cpu_cost_s']:.1f} s = {100 * po['cpu_cost_share']:.1f} % at the engine's "
                        f"{po['engine_cores_busy']:.2f} cores busy |")
    co = s.get("checks_overhead")
    if co:
        more.append(f"| check overhead, {MAIN} (every=1 vs every=0, threads x2, fastest of alternating runs) | "
                    f"{100 * co['overhead']:+.1f} % wall ({co['every_1_s']:.1f} s against {co['every_0_s']:.1f} s), "
                    f"{100 * (co['cpu_overhead'] or 0):+.1f} % CPU |")
    ip = s.get("in_place_rerun")
    if ip:
        more.append(f"| forced rerun over the store just written (chunks overwritten in place), {MAIN} threads x2 | "
                    f"{ip['in_place_s']:.1f} s against {ip['new_store_s']:.1f} s into a new store "
                    f"({100 * ip['vs_new_store']:+.1f} %) |")
    sf = s.get("small_first_run")
    if sf:
        more.append(f"| first run, small-file archive ({sf['files']} files), engine against its baseline | "
                    f"{sf['first_run_s']:.1f} s against {sf['baseline_s']:.1f} s = {sf['vs_baseline']:.2f}x "
                    f"({sf['per_file_ms']:.0f} ms per file, start-up included) |")
    for name, h in res["probes"].get("halo", {}).items():
        lay = "; ".join(f"{k}: {v['family']} {v['sections']} sections"
                        + (f", halo {v['halo']}, block {v['block_samples']}" if "halo" in v else
                           ", blocks with halos over the memory budget")
                        + (f", {v['carry_segments']} segment(s) in carry mode" if v.get("carry_segments") else "")
                        for k, v in h["layouts"].items())
        value = "-" if h["overhead"] is None else f"{100 * h['overhead']:.1f} %"
        more.append(f"| halo overhead, {name} ({lay}) | {value} (window/core - 1 over {h['blocks']} halo-mode "
                    f"blocks) |")
    for key, name in (("rerun_unchanged_big", "unchanged rerun, large archive"),
                      ("rerun_unchanged_small", "unchanged rerun, small-file archive")):
        p = res["probes"].get(key)
        if p:
            more.append(f"| {name}, run_job in process ({p['files']} files) | {p['run_job_s']:.2f} s "
                        f"({p['run_job_cpu_s']:.2f} s CPU): discovery {p['discover_s']:.2f} s "
                        f"(of it hashing {p['hash_s']:.2f} s) + rest {p['rest_s']:.2f} s "
                        f"(of it store records {p.get('store_records_s', 0):.2f} s, plan {p.get('plan_s', 0):.2f} s) |")
    if more:
        out.append("\n".join(["| figure | value |", "|---|---|"] + more))
    t = res.get("targets", [])
    if t:
        rows = ["| target | goal | measured | met |", "|---|---|---|---|"]
        for x in t:
            met = {True: "yes", False: "**no**", None: "not measured"}[x["met"]]
            rows.append(f"| {x['target']} | {x['goal']} | {x['measured']} | {met}"
                        + (f" ({x['note']})" if x["note"] else "") + " |")
        out.append("\n".join(rows))
    return "\n\n".join(out)


def machine_line(mach: dict[str, Any]) -> str:
    v = mach["versions"]
    return (f"{mach['cpu']}, {mach['logical_cores']} logical cores, {mach['ram_gib']} GiB RAM; "
            f"Python {v.get('python')}, numpy {v.get('numpy')}, scipy {v.get('scipy')}, dask {v.get('dask')}, "
            f"zarr {v.get('zarr')}, prefect {v.get('prefect')}, twinpass {v.get('twinpass')}")


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--size", default=DEFAULT_SIZE, help=f"size of the large archive (default {DEFAULT_SIZE})")
    p.add_argument("--quick", action="store_true", help="about 200 MB with 10-minute files: a smoke test")
    p.add_argument("--only", nargs="+", choices=SECTIONS, help="run only these sections")
    p.add_argument("--out", default=str(HERE / "results" / "latest.json"), help="results JSON path")
    p.add_argument("--workdir", default="/tmp/twinpass-bench", help="archives, stores and logs go here")
    p.add_argument("--channels", type=int, default=8)
    p.add_argument("--rate", type=int, default=1000, help="sample rate, Hz")
    p.add_argument("--file-seconds", type=float, default=3600.0, help="length of a full file, s")
    p.add_argument("--small-files", type=int, default=1000)
    p.add_argument("--regenerate", action="store_true", help="write the archive again even if it matches")
    p.add_argument("--repeat", type=int, default=2,
                   help="runs of the main design's baseline and of its engine/flow pair (threads, 2 workers); "
                        "the fastest of each counts (default 2)")
    p.add_argument("--probe-rerun", help=argparse.SUPPRESS)
    p.add_argument("--probe-halo", nargs="+", help=argparse.SUPPRESS)
    a = p.parse_args(argv)
    if a.probe_rerun:
        print(json.dumps(probe_rerun(a.probe_rerun)))
        return 0
    if a.probe_halo:
        print(json.dumps(probe_halo(a.probe_halo)))
        return 0
    if a.quick:
        a.size, a.file_seconds = "200MB", 600.0
    sections = a.only or list(SECTIONS)
    b = Bench(a)
    b.work.mkdir(parents=True, exist_ok=True)
    started = _dt.datetime.now(_dt.timezone.utc)
    t0 = time.perf_counter()
    mach = machine_info()
    print(machine_line(mach))
    compile_twinpass()
    if set(sections) - {"small", "halo"} or "halo" in sections:
        b.ensure_archive()
    errors = {}
    for sec in sections:
        try:
            getattr(b, f"sec_{sec}")()
        except Exception as exc:  # keep going: report what was measured
            errors[sec] = f"{type(exc).__name__}: {exc}"
            print(f"section {sec} failed: {errors[sec]}", flush=True)
    summary = b.summary()
    res: dict[str, Any] = {
        "date": started.isoformat(timespec="seconds"),
        "duration_s": time.perf_counter() - t0,
        "machine": mach,
        "load_average_at_end": os.getloadavg(),
        "settings": {k: v for k, v in vars(a).items() if not k.startswith("probe")},
        "sections": sections,
        "archive": b.info,
        "small_archive": b.small_info,
        "runs": {k: asdict(m) for k, m in b.runs.items()},
        "probes": b.probes,
        "summary": summary,
        "errors": errors,
    }
    res["targets"] = b.targets(summary)
    text = tables(res)
    print()
    print(machine_line(mach))
    print(text)
    out = Path(a.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(res, indent=2, default=str), encoding="utf-8")
    archive = (f" Archive: {b.info.get('bytes', 0) / 2**30:.2f} GiB, {b.info.get('files', 0)} files, "
               f"{b.info.get('samples', 0) / 1e6:.0f} Msamples ({b.info.get('channels')} channels at "
               f"{b.info.get('rate_hz')} Hz)." if b.info.get("files") else "")  # absent when only `small` ran
    header = (f"Measured {res['date']} on {machine_line(mach)}.{archive} Load average at start "
              f"{mach['load_average_at_start'][0]:.1f}, at end {res['load_average_at_end'][0]:.1f}. "
              f"Bench took {res['duration_s'] / 60:.1f} min.")
    out.with_suffix(".md").write_text(header + "\n\n" + text + "\n", encoding="utf-8")
    print(f"\nresults: {out} and {out.with_suffix('.md')} ({res['duration_s'] / 60:.1f} min)")
    return 1 if errors else 0


if __name__ == "__main__":
    sys.exit(main())
