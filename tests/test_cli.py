"""The command line end to end on small archives built here.

References: scipy.io.wavfile and Python's wave module write the WAV inputs (reference
libraries); the design numbers are checked in test_design.py, here only the CLI contract.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import wave
from pathlib import Path

import numpy as np
import pytest
import scipy.io.wavfile

from conftest import cli_env, make_signal, run_cli, write_config, write_stream
from twinpass.cli import build_parser

FS = 100


def _twinpass(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "twinpass.cli", *args], capture_output=True, text=True,
                          cwd=cwd, timeout=600)


def _signal(n: int, ch: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = np.arange(n) / FS
    return 0.3 * np.sin(2 * np.pi * 5 * t)[:, None] + 0.05 * rng.standard_normal((n, ch))


def _wav24(path: Path, x: np.ndarray) -> None:
    # Python's wave module writes 24-bit PCM (reference library).
    q = np.clip(np.round(x * 2**23), -(2**23), 2**23 - 1).astype("<i4")
    raw = q.view(np.uint8).reshape(-1, 4)[:, :3].tobytes()
    with wave.open(str(path), "wb") as w:
        w.setnchannels(x.shape[1])
        w.setsampwidth(3)
        w.setframerate(FS)
        w.writeframes(raw)


def mixed_archive(root: Path) -> Path:
    """Two-stream WAV 16/24-bit archive with a gap, an NPY stream, and raw + sidecar."""
    arch = root / "archive"
    (arch / "alpha").mkdir(parents=True)
    (arch / "beta").mkdir()
    (arch / "gamma").mkdir()
    n = 60 * FS  # one-minute files
    # contiguous files of one stream must share rate, channels and sample format
    _wav24(arch / "alpha/alpha_20260301T000000.wav", _signal(n, 2, 1))
    _wav24(arch / "alpha/alpha_20260301T000100.wav", _signal(n, 2, 2))
    # three minutes later: a gap, so a new segment
    scipy.io.wavfile.write(arch / "alpha/alpha_20260301T000500.wav", FS,
                           (_signal(n, 2, 3) * 32767).astype(np.int16))
    np.save(arch / "beta/beta_20260301T000000.npy", _signal(n, 1, 4).astype(np.float32))
    np.save(arch / "beta/beta_20260301T000100.npy", _signal(n, 1, 5).astype(np.float32))
    (_signal(n, 3, 6) * 1000).astype("<i2").tofile(arch / "gamma/gamma_20260301T000000.raw")
    (arch / "gamma/gamma_20260301T000000.raw.toml").write_text(
        'dtype = "int16"\nbyte_order = "little"\nchannels = 3\nsample_rate_hz = 100.0\n')
    cfg = root / "twinpass.toml"
    cfg.write_text(f"""
[response]
kind = "bandpass"
family = "butterworth"
passband_hz = [1.0, 20.0]
stopband_hz = [0.3, 35.0]
passband_ripple_db = 1.0
stopband_attenuation_db = 40.0

[processing]
tolerance = 1e-9
block_seconds = 30.0

[archive]
root = "archive"
include = ["**/*.wav", "**/*.npy", "**/*.raw"]
name_pattern = "{{stream}}/{{stream}}_{{start:%Y%m%dT%H%M%S}}"
sample_rate_hz = {FS}

[output]
store = "out.zarr"
dtype = "float64"

[engine]
scheduler = "threads"
workers = 2
""")
    return cfg


def test_design_prints_report_and_json(tmp_path: Path) -> None:
    cfg = mixed_archive(tmp_path)
    r = _twinpass("design", str(cfg), "--fs", "100")
    assert r.returncode == 0, r.stderr
    assert "effective length" in r.stdout and "non-causal" in r.stdout
    r = _twinpass("design", str(cfg), "--fs", "100", "--json")
    d = json.loads(r.stdout)
    for key in ("family", "order", "sos", "effective_length_samples", "tolerance",
                "overall_passband_ripple_db", "overall_stopband_attenuation_db"):
        assert key in d, key
    assert np.asarray(d["sos"]).shape[1] == 6
    # the achieved overall figures meet the requested ones
    assert d["overall_stopband_attenuation_db"] >= 40.0 - 1e-9
    assert d["overall_passband_ripple_db"] <= 1.0 + 1e-9


def test_design_bad_spec_exits_nonzero_with_one_line(tmp_path: Path) -> None:
    cfg = mixed_archive(tmp_path)
    r = _twinpass("design", str(cfg), "--fs", "50")  # 35 Hz stop edge above Nyquist 25 Hz
    assert r.returncode == 2
    lines = [ln for ln in r.stderr.strip().splitlines() if ln]
    assert len(lines) == 1 and "Nyquist" in lines[0]
    assert f"{cfg}: [response] at 50 Hz" in lines[0]  # the file, the table and the rate it was asked for


@pytest.mark.parametrize("fs", ["-5", "0", "nan", "inf", "fifty"])
def test_design_refuses_a_sample_rate_that_is_none_naming_the_option(tmp_path: Path, fs: str) -> None:
    # argparse's usage error (exit 2) names --fs, the value given on the command line; the
    # configuration file, which holds no sample rate, is not blamed.
    cfg = mixed_archive(tmp_path)
    r = _twinpass("design", str(cfg), "--fs", fs)
    assert r.returncode == 2, r.stdout + r.stderr
    last = r.stderr.strip().splitlines()[-1]
    assert "argument --fs" in last and fs in last and str(cfg) not in r.stderr, r.stderr


_EXIT_SCRIPT = """\
import atexit, sys
from twinpass import cli
marks, trace, args = sys.argv[1], sys.argv[2] == "trace", sys.argv[3:]

class Witness:  # a finaliser that runs only if the interpreter is finalised
    def __init__(self, path):
        self.path = path

    def __del__(self, _open=open):  # module globals may be gone by then
        _open(self.path, "w").write("yes")

witness = Witness(marks + ".finalised")
build = cli.build_parser

def build_and_register():  # an exit handler registered while the command runs
    atexit.register(lambda: open(marks + ".handler", "w").write("yes"))
    return build()

cli.build_parser = build_and_register
if trace:
    sys.settrace(lambda *a: None)
sys.argv = ["twinpass", *args]
sys.exit(cli.main())
"""


@pytest.mark.parametrize("trace", [False, True])
def test_the_command_ends_after_its_exit_handlers_without_finalising(tmp_path: Path, trace: bool) -> None:
    # The command line (main() with no arguments) ends the process once every exit handler
    # registered during the command has run, with its exit status and all its piped output,
    # but without finalising the interpreter (a finaliser does not run; the Python language
    # reference, object.__del__, does not promise that it would for objects alive at exit).
    # Under a tracer (coverage, a debugger) it finalises as usual.
    cfg = mixed_archive(tmp_path)
    reference = _twinpass("design", str(cfg), "--fs", "100", "--json")
    assert reference.returncode == 0, reference.stderr
    for args, status in ((["design", str(cfg), "--fs", "100", "--json"], 0),
                         (["design", str(cfg), "--fs", "50"], 2)):
        marks = tmp_path / f"marks-{status}"
        r = subprocess.run([sys.executable, "-c", _EXIT_SCRIPT, str(marks), "trace" if trace else "-", *args],
                           capture_output=True, text=True, timeout=600)
        assert r.returncode == status, r.stderr
        if status == 0:
            assert r.stdout == reference.stdout  # every byte of the piped output
        else:
            assert "Nyquist" in r.stderr
        assert (tmp_path / f"marks-{status}.handler").exists()
        assert (tmp_path / f"marks-{status}.finalised").exists() is trace


def test_plan_on_mixed_archive_with_gap(tmp_path: Path) -> None:
    cfg = mixed_archive(tmp_path)
    r = _twinpass("plan", str(cfg), "--json")
    assert r.returncode == 0, r.stderr
    plan = json.loads(r.stdout)
    files = {f["path"]: f for f in plan["files"]}
    assert len(files) == 6
    assert all(f["status"] == "new" for f in files.values())
    segs = {f["segment"] for f in files.values()}
    # alpha: two contiguous files + one after the gap; beta: one segment; gamma: one
    assert len(segs) == 4
    assert files["alpha/alpha_20260301T000000.wav"]["segment"] == files["alpha/alpha_20260301T000100.wav"]["segment"]
    assert files["alpha/alpha_20260301T000500.wav"]["segment"] != files["alpha/alpha_20260301T000100.wav"]["segment"]
    assert plan["totals"]["samples"] == 6 * 60 * FS
    r = _twinpass("plan", str(cfg))
    assert "alpha/alpha_20260301T000500.wav" in r.stdout and "new" in r.stdout


def test_plan_exits_as_the_run_would_for_inputs_left_out(tmp_path: Path) -> None:
    # A file cut short mid-frame is left out by both; the plan says so with the run's exit
    # status (3), before anything is filtered; without it both exit 0.
    from twinpass.cli import EXIT_LEFT_OUT

    cfg = mixed_archive(tmp_path)
    assert _twinpass("plan", str(cfg)).returncode == 0
    bad = tmp_path / "archive/alpha/alpha_20260301T000500.wav"
    bad.write_bytes(bad.read_bytes()[:-1])  # 16-bit stereo: the last frame is cut short
    r = _twinpass("plan", str(cfg))
    assert r.returncode == EXIT_LEFT_OUT, r.stdout + r.stderr
    assert "invalid" in r.stdout and "alpha/alpha_20260301T000500.wav" in r.stdout
    assert _twinpass("plan", str(cfg), "--json").returncode == EXIT_LEFT_OUT
    r = _twinpass("run", str(cfg), "--no-flow", "--no-report")
    assert r.returncode == EXIT_LEFT_OUT, r.stdout + r.stderr


def test_a_rate_no_filter_suits_is_said_with_remedies_a_user_can_apply_and_keeps_the_stream(tmp_path: Path) -> None:
    # At 200 Hz the Nyquist frequency is 100 Hz (half the sample rate, Nyquist-Shannon), so
    # a 120 Hz band edge cannot be designed: the plan leaves the stream's files out in one
    # sentence whose remedies apply to recordings that exist ([response], [archive] exclude),
    # naming the stream the name pattern gives, also for a file that cannot be opened.
    write_stream(tmp_path / "archive", "deck", make_signal(4000, 1, 200.0, seed=2), 200.0, 2)
    (tmp_path / "archive/deck/deck_20260301T000020.npy").write_bytes(b"\x93NUMPY not really")
    cfg = write_config(tmp_path, response={"kind": "bandpass", "family": "butterworth", "order": 2,
                                           "cutoff_hz": [2.0, 120.0]})
    r = _twinpass("plan", str(cfg), "--json")
    assert r.returncode == 3, r.stdout + r.stderr
    files = {f["path"]: f for f in json.loads(r.stdout)["files"]}
    assert {f["status"] for f in files.values()} == {"invalid"} and len(files) == 3, files
    assert {f["stream"] for f in files.values()} == {"deck"}, files
    refused = files["deck/deck_20260301T000000.npy"]
    text = f"{refused['reason']}; {refused['remedy']}"
    assert "Nyquist frequency 100 Hz" in text and ".;" not in text and "higher sample rate" not in text, text
    assert "[response]" in refused["remedy"] and "[archive] exclude" in refused["remedy"], text
    table = _twinpass("plan", str(cfg)).stdout
    assert all(line.split()[1] == "deck" for line in table.splitlines() if line.startswith("invalid")), table


@pytest.mark.slow
def test_run_no_flow_then_status_and_report(tmp_path: Path) -> None:
    cfg = mixed_archive(tmp_path)
    r = _twinpass("run", str(cfg), "--no-flow")
    assert r.returncode == 0, r.stdout + r.stderr
    assert "blocks" in r.stderr  # the progress bar
    r = _twinpass("status", str(cfg), "--json", "--require-complete")
    assert r.returncode == 0, r.stdout + r.stderr
    st = json.loads(r.stdout)
    assert st["totals"]["files"] == 6 and st["totals"]["complete"] == 6
    assert {f["stream"] for f in st["files"]} == {"alpha", "beta", "gamma"}
    r = _twinpass("status", str(tmp_path / "out.zarr"))
    assert "stream alpha" in r.stdout and r.returncode == 0
    r = _twinpass("status", str(tmp_path / "out.zarr" / "alpha"))  # a group inside the store
    assert r.returncode == 2 and f"give the store itself: twinpass status {tmp_path / 'out.zarr'}" in r.stderr, r.stderr
    r = _twinpass("status", str(tmp_path / "twinpass-typo.toml"))  # a configuration path mistyped
    assert r.returncode == 2 and "twinpass-typo.toml" in r.stderr and "not found" in r.stderr, r.stderr
    assert "output store" not in r.stderr, r.stderr  # the configuration is what is missing
    report = tmp_path / "out.report.html"  # named after the store, out.zarr
    assert report.is_file()
    # The report is for handing on: the permissions of any new file under the umask (the
    # test's subprocesses inherit this process's umask), not those of a private temporary file.
    umask = os.umask(0o022)
    os.umask(umask)
    assert report.stat().st_mode & 0o777 == 0o666 & ~umask, oct(report.stat().st_mode)
    html = report.read_text()
    assert html.count("data:image/png;base64,") >= 5
    # a second run skips everything
    r = _twinpass("run", str(cfg), "--no-flow", "--no-report")
    assert r.returncode == 0 and "blocks run 0" in r.stdout
    st = json.loads(_twinpass("status", str(cfg), "--json").stdout)
    assert st["runs_total"] == 2 and st["last_run"]["counts"]["skipped"] == 6
    assert "runs recorded: 2; last " in _twinpass("status", str(cfg)).stdout
    r = _twinpass("plan", str(cfg), "--json")
    assert all(f["status"] == "unchanged" for f in json.loads(r.stdout)["files"])


def test_an_unchanged_rerun_does_not_load_the_dask_scheduler(tmp_path: Path) -> None:
    # Nothing to filter: no Dask cluster is started, so its library (about 0.75 s of imports
    # here) is not loaded either; a rerun of an unchanged archive pays only for its checks.
    cfg = mixed_archive(tmp_path)
    assert _twinpass("run", str(cfg), "--no-flow", "--no-report").returncode == 0
    code = ("import sys\nfrom twinpass import cli\nrc = cli.main(['run', sys.argv[1], '--no-flow', '--no-report'])\n"
            "print('distributed' in sys.modules)\nsys.exit(rc)")
    r = subprocess.run([sys.executable, "-c", code, str(cfg)], capture_output=True, text=True, timeout=300)
    assert r.returncode == 0 and "blocks run 0" in r.stdout, r.stdout + r.stderr
    assert r.stdout.strip().splitlines()[-1] == "False"


def test_a_run_that_leaves_inputs_out_exits_3_until_they_are_excluded(tmp_path: Path) -> None:
    # Exit statuses as the command's documentation states them: 3 when the run finished
    # with no file failed but inputs left out; `status --require-complete` fails while the
    # last run left inputs out; excluding the file in [archive] exclude ends both.
    cfg = mixed_archive(tmp_path)
    bad = tmp_path / "archive" / "beta" / "beta_20260301T000200.npy"
    bad.write_bytes(b"\x93NUMPY not really")
    r = _twinpass("run", str(cfg), "--no-flow", "--no-report")
    assert r.returncode == 3, r.stdout + r.stderr
    assert "invalid 1" in r.stdout and "beta/beta_20260301T000200.npy" in r.stderr
    r = _twinpass("status", str(cfg), "--require-complete")
    assert r.returncode == 1 and "1 input(s) left out by the last run (beta/beta_20260301T000200.npy;" in r.stderr, \
        r.stderr
    assert "beta/beta_20260301T000200.npy" in r.stdout
    cfg.write_text(cfg.read_text().replace('include = ["**/*.wav", "**/*.npy", "**/*.raw"]',
                                           'include = ["**/*.wav", "**/*.npy", "**/*.raw"]\n'
                                           'exclude = ["beta/beta_20260301T000200.npy"]'))
    r = _twinpass("run", str(cfg), "--no-flow", "--no-report")
    assert r.returncode == 0 and "invalid 0" in r.stdout, r.stdout + r.stderr
    assert _twinpass("status", str(cfg), "--require-complete").returncode == 0


@pytest.mark.parametrize("left_out", [False, True])
def test_a_report_that_cannot_be_written_after_the_run_keeps_the_runs_exit_status(tmp_path: Path,
                                                                                  left_out: bool) -> None:
    # The report's path is taken by a folder (POSIX rename(2): a file cannot replace a
    # directory), found only after every block is filtered and recorded. The exit status
    # is the run's own, as the command's documentation gives it (0 clean, 3 inputs left
    # out), not 2 ("stopped before it began"); the summary is printed, then one error line
    # naming the report's path and how to write it later; the store's records agree.
    write_stream(tmp_path / "archive", "deck", make_signal(4000, 1, 200.0, seed=3), 200.0, 2)
    cfg = write_config(tmp_path)
    if left_out:  # an NPY file whose header is cut off (numpy's NPY format: magic, version, header)
        (tmp_path / "archive" / "deck" / "deck_20260301T000020.npy").write_bytes(b"\x93NUMPY not really")
    report = tmp_path / "out.report.html"  # the report's default path beside out.zarr
    report.mkdir()
    r = _twinpass("run", str(cfg), "--no-flow")
    assert r.returncode == (3 if left_out else 0), r.stdout + r.stderr
    assert f"complete 2, skipped (unchanged) 0, failed 0, invalid {int(left_out)}; blocks run" in r.stdout, r.stdout
    assert f"store: {tmp_path / 'out.zarr'}" in r.stdout, r.stdout
    last = r.stderr.strip().splitlines()[-1]
    assert last.startswith(f"twinpass: error: {report}: cannot write the report"), r.stderr
    assert f"twinpass report {cfg}" in last and "Traceback" not in r.stderr, r.stderr
    r = _twinpass("status", str(cfg), "--require-complete")
    assert r.returncode == (1 if left_out else 0), r.stdout + r.stderr


def test_an_archive_where_no_file_matches_include_is_exit_2_naming_what_it_holds(tmp_path: Path) -> None:
    # An archive root whose recordings the include globs miss (Zarr arrays with the default
    # include; an unmounted share leaves an empty folder) must not be a quiet "0 files,
    # exit 0": the command stops before the run with exit status 2, as documented for a
    # bad configuration, naming the root, the globs and what the root holds.
    import zarr

    archive = tmp_path / "archive"
    for name in ("a.zarr", "b.zarr"):
        zarr.create_array(str(archive / "deck" / name), shape=(400, 1), dtype="float32", zarr_format=3)
    (archive / "notes.txt").write_text("site log")
    folder = tmp_path / "job"
    folder.mkdir()
    cfg = write_config(folder, archive={"root": str(archive), "include": ["**/*.wav"]})
    for command in (["plan", str(cfg)], ["run", str(cfg), "--no-flow", "--no-report"]):
        r = _twinpass(*command)
        assert r.returncode == 2, r.stdout + r.stderr
        assert str(archive) in r.stderr and "['**/*.wav']" in r.stderr, r.stderr
        assert "2 *.zarr, 1 *.txt" in r.stderr and "**/*.zarr" in r.stderr, r.stderr
    (archive / "notes.txt").unlink()
    for path in sorted(archive.rglob("*"), reverse=True):
        path.unlink() if path.is_file() else path.rmdir()
    r = _twinpass("run", str(cfg), "--no-flow", "--no-report")
    assert r.returncode == 2 and "it holds no files" in r.stderr, r.stderr


def test_a_configured_prefect_api_that_does_not_answer_stops_the_command_before_the_run(tmp_path: Path) -> None:
    # A port nobody listens on (bound, never listening: connections are refused, RFC 793's
    # reset for a closed port). The command exits 2 naming PREFECT_API_URL and the remedies,
    # before it takes the store's lock or starts any block.
    import socket

    cfg = mixed_archive(tmp_path)
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        url = f"http://127.0.0.1:{sock.getsockname()[1]}/api"
        r = subprocess.run([sys.executable, "-m", "twinpass.cli", "run", str(cfg), "--no-report"],
                           capture_output=True, text=True, env=cli_env(PREFECT_API_URL=url), timeout=600)
    assert r.returncode == 2, r.stdout + r.stderr
    assert url in r.stderr and "PREFECT_API_URL" in r.stderr and "--no-flow" in r.stderr, r.stderr
    assert "Traceback" not in r.stderr and not (tmp_path / "out.zarr").exists()


@pytest.mark.parametrize("workers", ["0", "-2", "two"])
def test_workers_on_the_command_line_must_be_a_whole_number_of_at_least_one(tmp_path: Path, workers: str) -> None:
    # argparse's own usage error (exit 2) naming the option: 0 used to fall back silently
    # to the configured workers.
    cfg = mixed_archive(tmp_path)
    r = _twinpass("run", str(cfg), "--no-flow", "--workers", workers)
    assert r.returncode == 2 and "--workers" in r.stderr, r.stderr
    assert not (tmp_path / "out.zarr").exists()


def test_a_scheduler_that_is_none_is_refused_before_the_run_locks_or_records_anything(tmp_path: Path) -> None:
    # "thread" (for threads) is refused as [engine] scheduler is at load time: exit 2 naming
    # --scheduler and what to give, whether or not there is work to do, and no run is recorded
    # (a record would show a run stopped before its end, with every file unfinished).
    from twinpass.config import load_config
    from twinpass.errors import ConfigError
    from twinpass.job import run_job

    advice = "use threads, processes or an address like tcp://127.0.0.1:8786"  # as for [engine] scheduler
    cfg = mixed_archive(tmp_path)
    r = _twinpass("run", str(cfg), "--no-flow", "--no-report", "--scheduler", "thread")
    assert r.returncode == 2, r.stdout + r.stderr
    assert f"--scheduler 'thread': {advice}" in r.stderr and "Traceback" not in r.stderr, r.stderr
    assert not (tmp_path / "out.zarr").exists()
    with pytest.raises(ConfigError, match="scheduler 'thread'"):  # the engine alone, from Python
        run_job(load_config(cfg), scheduler="thread")
    with pytest.raises(ConfigError, match="workers 0"):
        run_job(load_config(cfg), workers=0)
    assert not (tmp_path / "out.zarr").exists()
    assert _twinpass("run", str(cfg), "--no-flow", "--no-report").returncode == 0
    for extra in ([], ["--force"]):  # nothing to do, then everything to do
        r = _twinpass("run", str(cfg), "--no-flow", "--no-report", "--scheduler", "thread", *extra)
        assert r.returncode == 2 and advice in r.stderr, r.stdout + r.stderr
    st = json.loads(_twinpass("status", str(cfg), "--json").stdout)
    assert st["runs_total"] == 1 and not st["last_run"].get("interrupted"), st["last_run"]


def test_output_to_a_reader_that_went_away_ends_quietly(tmp_path: Path) -> None:
    # `twinpass design ... | head`: the reader closes the pipe before the output is written.
    # No traceback; exit 141 (128 + SIGPIPE, what a shell reports for such a command: common
    # practice).
    cfg = mixed_archive(tmp_path)
    p = subprocess.Popen([sys.executable, "-m", "twinpass.cli", "design", str(cfg), "--fs", "100", "--json"],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=cli_env())
    assert p.stdout is not None and p.stderr is not None
    p.stdout.close()
    err = p.stderr.read().decode()
    assert p.wait(timeout=600) == 141 and "Traceback" not in err, err


def test_plan_names_the_segments_no_block_layout_fits(tmp_path: Path) -> None:
    # 0.5 s blocks at 100 Hz are 50 samples, shorter than the response check needs (the
    # README's shortest block): the plan says so for each segment with work and exits 2,
    # as the run would fail those segments.
    cfg = mixed_archive(tmp_path)
    cfg.write_text(cfg.read_text().replace("block_seconds = 30.0", "block_seconds = 0.5"))
    r = _twinpass("plan", str(cfg))
    assert r.returncode == 2, r.stdout + r.stderr
    lines = [ln for ln in r.stdout.splitlines() if ln.startswith("cannot run segment ")]
    assert len(lines) == 4 and all("block_seconds" in ln for ln in lines), r.stdout  # alpha x2, beta, gamma
    r = _twinpass("plan", str(cfg), "--json")
    assert r.returncode == 2 and len(json.loads(r.stdout)["problems"]) == 4


def test_unknown_config_key_is_exit_2(tmp_path: Path) -> None:
    cfg = mixed_archive(tmp_path)
    cfg.write_text(cfg.read_text().replace("[processing]", "[processing]\nblok_seconds = 3"))
    r = _twinpass("plan", str(cfg))
    assert r.returncode == 2
    assert "blok_seconds" in r.stderr and "[processing]" in r.stderr


def test_carry_mode_with_an_fir_family_is_exit_2_before_the_run(tmp_path: Path) -> None:
    # An FIR filter has no recursive state to carry (a transversal filter's state is its
    # last M - 1 inputs, not a few numbers per section): a configuration asking for both
    # is refused as a bad configuration (exit 2, documented), not failed file by file.
    from conftest import LOWPASS_FIR, make_signal, write_stream

    write_stream(tmp_path / "archive", "deck", make_signal(4000, 1, 200.0, seed=3), 200.0, 2)
    cfg = write_config(tmp_path, response=LOWPASS_FIR, processing={"mode": "carry"})
    r = _twinpass("run", str(cfg), "--no-flow", "--no-report")
    assert r.returncode == 2, r.stdout + r.stderr
    assert 'mode = "carry"' in r.stderr and 'family = "fir"' in r.stderr and str(cfg) in r.stderr, r.stderr
    assert not (tmp_path / "out.zarr").exists()


@pytest.mark.parametrize("table, key", [("processing", "block_seconds"), ("processing", "memory_budget_mib"),
                                        ("output", "chunk_seconds")])
def test_nan_block_and_chunk_lengths_are_exit_2(tmp_path: Path, table: str, key: str) -> None:
    # A length in seconds or a budget in MiB is a finite number (config.py docstrings); TOML's
    # nan is refused by plan, naming the file, the table and the key, before any run.
    cfg = mixed_archive(tmp_path)
    assert _twinpass("plan", str(cfg)).returncode == 0
    text = cfg.read_text().replace("block_seconds = 30.0\n", "")
    cfg.write_text(text.replace(f"[{table}]\n", f"[{table}]\n{key} = nan\n"))
    r = _twinpass("plan", str(cfg))
    assert r.returncode == 2, r.stdout + r.stderr
    assert f"{cfg}: [{table}] {key} = nan is not a finite number" in r.stderr


@pytest.mark.parametrize("setting, named", [("seam_samples = -3", "seam_samples = -3"),
                                             ("coherence_min = 2.0", "coherence_min = 2.0"),
                                             ("passband_fail_db = -1.0", "passband_fail_db = -1.0")])
def test_checks_thresholds_out_of_range_are_exit_2(tmp_path: Path, setting: str, named: str) -> None:
    # README "Checks, status and report": seam_samples >= 0, coherence_min in [0, 1],
    # passband_fail_db >= 0. Values outside are refused by plan, not met as
    # an internal store error or as every block failing at run time.
    cfg = mixed_archive(tmp_path)
    cfg.write_text(cfg.read_text() + f"\n[checks]\n{setting}\n")
    r = _twinpass("plan", str(cfg))
    assert r.returncode == 2, r.stdout + r.stderr
    assert f"{cfg}: [checks] {named} " in r.stderr


@pytest.mark.skipif(sys.platform != "linux", reason="names that are not UTF-8 are a POSIX file system's")
def test_a_flow_run_from_a_folder_whose_name_is_not_utf8_is_refused_before_it_starts(tmp_path: Path) -> None:
    # Prefect sends a flow run's parameters as UTF-8 JSON (RFC 8259 section 8.1: JSON text
    # exchanged between systems is UTF-8); a folder name that is not UTF-8 cannot be sent.
    # The command exits 2 naming the path and the remedies, before it takes the store's
    # lock or writes anything; the engine alone (--no-flow) runs there as usual.
    folder = Path(os.fsdecode(os.fsencode(str(tmp_path)) + b"/site-\xff"))
    folder.mkdir()
    cfg = mixed_archive(folder)
    env = {**cli_env(), "PREFECT_API_URL": "http://127.0.0.1:9/api"}  # never reached
    r = subprocess.run([sys.executable, "-m", "twinpass.cli", "run", str(cfg), "--no-report"], capture_output=True,
                       text=True, errors="backslashreplace", env=env, timeout=600)
    assert r.returncode == 2, r.stderr
    assert "site-\\xff" in r.stderr and "not UTF-8" in r.stderr and "--no-flow" in r.stderr, r.stderr
    assert "Traceback" not in r.stderr and not (folder / "out.zarr").exists()
    r = subprocess.run([sys.executable, "-m", "twinpass.cli", "run", str(cfg), "--no-flow", "--no-report"],
                       capture_output=True, text=True, errors="backslashreplace", env=env, timeout=600)
    assert r.returncode == 0, r.stderr


def test_run_in_process_leaves_the_garbage_collector_on(tmp_path: Path) -> None:
    # The run command pauses the cyclic collector only while it imports its modules.
    import gc

    from twinpass import cli
    from twinpass.startup import start_up_imports

    cfg = mixed_archive(tmp_path)
    assert gc.isenabled()
    frozen = gc.get_freeze_count()
    assert cli.main(["run", str(cfg), "--no-flow", "--no-report"]) == 0
    assert gc.isenabled()
    assert gc.get_freeze_count() == frozen  # a caller's objects are never frozen
    assert cli.main(["run", str(tmp_path / "missing.toml"), "--no-flow"]) == 2  # the error path too
    assert gc.isenabled()
    gc.disable()  # a caller that keeps the collector off gets it back off
    try:
        with pytest.raises(RuntimeError):
            with start_up_imports():
                assert not gc.isenabled()
                raise RuntimeError("import failed")
        assert not gc.isenabled()
    finally:
        gc.enable()
    with start_up_imports():
        assert not gc.isenabled()
    assert gc.isenabled()
    # The command's own process freezes what its imports built (a child process: the
    # freeze is process-wide).
    code = ("import gc, sys\nfrom twinpass.startup import start_up_imports\nn = gc.get_freeze_count()\n"
            "with start_up_imports(freeze=True):\n    import twinpass.job\n"
            "sys.exit(0 if gc.isenabled() and gc.get_freeze_count() > n + 1000 else 1)")
    assert subprocess.run([sys.executable, "-c", code], timeout=300).returncode == 0


def test_compile_makes_the_filter_loops_ready_and_says_so(tmp_path):
    # numba is a dependency: the compiled loops load (or compile) and pass their check
    # against scipy.signal.sosfilt.
    proc = run_cli(["compile"])
    assert "compiled filter loops ready" in proc.stdout
    off = run_cli(["compile"], env=cli_env(TWINPASS_JIT="0"))
    assert "turned off" in off.stdout


def test_compile_fails_clearly_when_numba_cannot_load(tmp_path):
    # Injected fault: a numba that raises on import (a broken installation).
    fake = tmp_path / "broken" / "numba"
    fake.mkdir(parents=True)
    (fake / "__init__.py").write_text("raise ImportError('numba is broken here')\n", encoding="utf-8")
    env = cli_env()
    env["PYTHONPATH"] = str(fake.parent) + os.pathsep + env["PYTHONPATH"]
    proc = run_cli(["compile"], env=env, check=False)
    assert proc.returncode == 1
    assert "not available on this machine" in proc.stderr and "still runs" in proc.stderr


# ----------------------------------------------------------------- progress display
class _Terminal:
    """A stand-in for a terminal's stderr: keeps what is written, says it is a TTY."""

    def __init__(self, tty: bool) -> None:
        self.text = ""
        self.tty = tty

    def write(self, s: str) -> int:
        self.text += s
        return len(s)

    def flush(self) -> None:
        pass

    def isatty(self) -> bool:
        return self.tty


def test_the_progress_bar_gives_log_lines_a_line_of_their_own(monkeypatch):
    # On a terminal the bar is redrawn in place ("\r"); a log record made while it is
    # shown first erases it ("\r" + ANSI erase-in-line, ECMA-48 EL), so the log line
    # starts at the line's beginning; the next block draws the bar again and close() ends
    # its line with the final count.
    import logging

    from twinpass import cli

    term = _Terminal(tty=True)
    monkeypatch.setattr(sys, "stderr", term)
    bar = cli._ProgressBar()
    handler = logging.StreamHandler(term)
    log = logging.getLogger("twinpass.test-progress")
    log.addHandler(handler)
    log.propagate = False
    try:
        with bar.over_logs():
            bar("a", 1, 2, None)
            log.warning("a log line")
            bar("b", 1, 1, None)
            bar("a", 2, 2, None)
        log.warning("after the run")  # the bar was cleared on leaving
    finally:
        log.removeHandler(handler)
    bar.close()
    assert term.text.startswith("\rblocks [###############...............] 1/2\r\x1b[Ka log line\n"), term.text
    assert "\rblocks [####################..........] 2/3\rblocks [##############################] 3/3" in term.text
    assert term.text.endswith("3/3\r\x1b[Kafter the run\n\rblocks [##############################] 3/3\n"), term.text


def test_without_a_terminal_progress_is_a_line_now_and_then_and_the_final_count_once(monkeypatch):
    from twinpass import cli

    term = _Terminal(tty=False)
    monkeypatch.setattr(sys, "stderr", term)
    bar = cli._ProgressBar()
    for done in range(1, 4):
        bar("a", done, 3, None)
    bar.close()
    bar.close()  # nothing more
    assert term.text == "blocks 1/3\nblocks 3/3\n", term.text


def test_the_progress_bar_says_its_total_is_so_far_until_every_segment_has_counted_its_blocks(monkeypatch):
    # A segment counts its blocks once its files are prepared, so the total grows: told the
    # segments to come, the bar calls its total the total so far while any has not counted
    # its blocks, and the line that no longer says so erases the longer one (ECMA-48 EL).
    from twinpass import cli

    term = _Terminal(tty=True)
    monkeypatch.setattr(sys, "stderr", term)
    bar = cli._ProgressBar()
    bar.expect(["a", "b"])
    bar("a", 1, 2, None)
    bar("b", 1, 1, None)
    bar.close()
    assert term.text == ("\rblocks [###############...............] 1/2 so far, 1 more segment(s) to come"
                         "\r\x1b[K\rblocks [####################..........] 2/3"
                         "\rblocks [####################..........] 2/3\n"), term.text
    term = _Terminal(tty=False)
    monkeypatch.setattr(sys, "stderr", term)
    bar = cli._ProgressBar()
    bar.expect(["a", "b"])
    bar("a", 1, 2, None)
    bar.close()  # "b" never counted its blocks (its segment failed first): the last line is the count alone
    assert term.text == "blocks 1/2 so far, 1 more segment(s) to come\nblocks 1/2\n", term.text


def test_a_run_tells_the_progress_bar_the_segments_to_come(tmp_path, monkeypatch):
    # Two streams, two segments with blocks: at the first block only its own segment has
    # counted its blocks, so the first line says one more segment is to come; the last
    # gives the blocks the run ran, all of them.
    from twinpass import cli
    from twinpass.config import load_config
    from twinpass.job import run_job

    for seed, stream in enumerate(("deck", "pier")):
        write_stream(tmp_path / "archive", stream, make_signal(4000, 1, 200.0, seed=seed), 200.0, 2)
    term = _Terminal(tty=False)
    monkeypatch.setattr(sys, "stderr", term)
    bar = cli._ProgressBar()
    res = run_job(load_config(write_config(tmp_path)), on_block=bar)
    bar.close()
    lines = term.text.splitlines()
    assert lines[0].startswith("blocks 1/") and lines[0].endswith(" so far, 1 more segment(s) to come"), lines
    n = res.counts()["blocks_run"]
    assert lines[-1] == f"blocks {n}/{n}", lines


def test_require_complete_names_the_inputs_left_out_or_failed_up_to_a_few() -> None:
    from twinpass.status import shortfalls

    totals = {"files": 2, "incomplete": 0, "checks_failed": 0, "blocks_failed": 0}
    left = {f"deck/deck_{k}.wav": "cannot be opened" for k in range(5)}
    said = shortfalls({"totals": totals, "left_out": left, "failed_inputs": {"pier/p.wav": "disk gone"}})
    assert said == ["1 input(s) failed at the last run (pier/p.wav)",
                    "5 input(s) left out by the last run (deck/deck_0.wav, deck/deck_1.wav, deck/deck_2.wav and 2 "
                    "more; exclude them in [archive] exclude if that is intended)"], said


# ----------------------------------------------------------------------------- --help texts
def _parsers() -> dict[str, argparse.ArgumentParser]:
    """The `twinpass` parser ("") and each command's, by command name."""
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return {"": parser, **sub.choices}


def _help(parser: argparse.ArgumentParser, dest: str) -> str:
    """The help of ``parser``'s argument ``dest`` as ``--help`` shows it (``%(default)s`` expanded)."""
    action = next(a for a in parser._actions if a.dest == dest)
    return " ".join(parser._get_formatter()._expand_help(action).split())


def test_every_argument_says_what_it_is_and_shows_its_default() -> None:
    # Source: the argparse parser of the `twinpass` command (every argument it accepts, and
    # the value each takes when left out).
    for name, parser in _parsers().items():
        if name:
            assert parser.description, f"twinpass {name} --help does not say what the command does"
        for action in parser._actions:
            if isinstance(action, argparse._SubParsersAction):
                continue
            text = _help(parser, action.dest)
            assert text, f"twinpass {name}: {action.option_strings or action.dest} has no help"
            if action.default not in (None, False, argparse.SUPPRESS):
                assert f"default {action.default}" in text, f"twinpass {name}: {action.dest} hides its default"


def test_help_says_what_the_commands_need_and_refuse() -> None:
    # Sources: twinpass.cli.cmd_run (refuses --block with --no-flow), twinpass.status.shortfalls
    # (what --require-complete requires: a held lock fails it, and damage --verify finds), and
    # twinpass serve without PREFECT_API_URL, which Prefect serves through a temporary server.
    parsers = _parsers()
    assert "--no-flow" in _help(parsers["run"], "block") and "--block" in _help(parsers["run"], "no_flow")
    refused = _twinpass("run", "--block", "nightly-job", "--no-flow")
    assert refused.returncode == 2 and "drop --no-flow" in refused.stderr, refused.stderr
    required = _help(parsers["status"], "require_complete")
    assert "lock" in required and "--verify" in required and "left no input out" in required
    serve = " ".join(parsers["serve"].description.split())
    assert "temporary local server" in serve and "needs a Prefect server" not in serve
