"""The HTML run report.

References: the HTML is parsed with Python's html.parser, images are decoded with
matplotlib.image (PNG), the two-pass impulse response is compared with scipy.signal.sosfilt
run forward and then backward over an impulse (the definition of forward-backward
filtering), the overlay with scipy.signal.sosfiltfilt, and the page is rendered by a
headless Chromium when one is installed.
"""

from __future__ import annotations

import base64
import html
import io
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from matplotlib import image as mpimg
from scipy import signal

from twinpass import report
from twinpass.core.effective import effective_length
from twinpass.core.types import Design, ResponseSpec

FS = 100.0
TOL = 1e-9
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), file signature
HEADINGS = (
    "Summary",
    "Cautions",
    "Filter design",
    "Overall response",
    "Phase",
    "Impulse response",
    "Design report",
    "Block check map",
    "Before and after filtering",
    "Files",
)


def bandpass() -> Design:
    spec = ResponseSpec(kind="bandpass", family="elliptic", passband_hz=(0.5, 30.0), stopband_hz=(0.1, 45.0),
                        passband_ripple_db=1.0, stopband_attenuation_db=60.0)
    n, wn = signal.ellipord([0.5, 30.0], [0.1, 45.0], 0.5, 30.0, fs=FS)
    sos = signal.ellip(n, 0.5, 30.0, wn, "bandpass", output="sos", fs=FS)
    return Design(spec=spec, family="elliptic", sample_rate_hz=FS, order=n, sos=sos, taps=None,
                  effective_length=effective_length(sos=sos, tolerance=TOL), tolerance=TOL,
                  report={"kind": "bandpass", "family": "elliptic", "edges": [{"edge": "passband", "hz": 0.5}]})


def fir_lowpass() -> Design:
    spec = ResponseSpec(kind="lowpass", order=60, cutoff_hz=(12.5,), cutoff_means="per-pass", family="fir")
    taps = signal.firwin(61, 12.5, fs=FS)
    return Design(spec=spec, family="fir", sample_rate_hz=FS, order=60, sos=None, taps=taps,
                  effective_length=effective_length(taps=taps, tolerance=TOL), tolerance=TOL)


class _Collector(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.headings: list[str] = []
        self.images: list[str] = []
        self.links: list[str] = []
        self._in_heading = False
        self.tags: set[str] = set()

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.add(tag)
        a = dict(attrs)
        if tag in ("h1", "h2", "h3", "h4"):
            self._in_heading = True
            self.headings.append("")
        if tag == "img":
            self.images.append(a.get("src") or "")
        for key in ("src", "href", "action", "poster", "data"):
            if a.get(key):
                self.links.append(a[key] or "")

    def handle_endtag(self, tag: str) -> None:
        if tag in ("h1", "h2", "h3", "h4"):
            self._in_heading = False

    def handle_data(self, data: str) -> None:
        if self._in_heading:
            self.headings[-1] += data


def _blocks() -> list[dict]:
    statuses = [1, 1, 2, 3, 0, 4, "pass"]
    out = []
    for s, stream in enumerate(("north-deck", "south-pier")):
        for i in range(14):
            out.append(dict(stream=stream, file=f"{stream}/rec_{i // 7}.wav", start_time_s=1.6e9 + i * 300.0 + s,
                            duration_s=300.0, status=statuses[i % len(statuses)]))
    return out


def _overlay(design: Design) -> dict:
    t = np.arange(-400, 401) / FS
    x = 0.05 * np.random.default_rng(0).standard_normal(t.size)
    x[400] += 4.0
    return dict(file="north-deck/rec_0.wav", t=t, before=x, after=signal.sosfiltfilt(design.sos, x))


@pytest.fixture(scope="module")
def rendered(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    designs = [bandpass(), fir_lowpass()]
    files = [
        dict(file="north-deck/rec_0.wav", stream="north-deck", blocks_done=7, blocks_total=7, blocks_failed=1,
             worst={"passband_dev_db": 0.02, "phase_deg": -0.1, "stopband_att_db": None}, edge_zones=[[0.0, 34.3]],
             complete=False),
        dict(file="south-pier/rec_1.wav", stream="south-pier", blocks_done=7, blocks_total=7, blocks_failed=0,
             worst={"passband_dev_db": -0.01}, edge_zones="none", complete=True, note="<b>escaped</b>"),
    ]
    path = tmp_path_factory.mktemp("report") / "sub" / "report.html"
    out = report.render_report(
        path,
        design_reports=[designs[0].report],
        designs=designs,
        files=files,
        blocks=_blocks(),
        overlays=[_overlay(designs[0])],
        title="Bridge deck survey <filtered>",
        cautions=["Recorder clocks were not disciplined."],
    )
    return out, out.read_text(encoding="utf-8")


def test_report_file_sections_and_images(rendered: tuple[Path, str]) -> None:
    path, text = rendered
    assert path.is_file()
    parsed = _Collector()
    parsed.feed(text)
    for heading in HEADINGS:
        assert any(h.strip().startswith(heading) for h in parsed.headings), heading
    # 3 figures per design (2 designs) + the block map + 1 overlay.
    assert len(parsed.images) == 3 * 2 + 1 + 1
    for src in parsed.images:
        assert src.startswith("data:image/png;base64,")
        png = base64.b64decode(src.split(",", 1)[1])
        assert png.startswith(PNG_SIGNATURE)
        pixels = mpimg.imread(io.BytesIO(png), format="png")
        assert pixels.shape[0] > 100 and pixels.shape[1] > 400
    # Self-contained: every link is a data URI, no script, no remote reference anywhere.
    assert all(link.startswith("data:") for link in parsed.links)
    assert "script" not in parsed.tags
    assert not re.search(r"(?i)(https?:|ftp:)//|@import|url\(", text)
    assert "<b>escaped</b>" not in text and html.escape("<b>escaped</b>") in text
    assert html.escape("Bridge deck survey <filtered>") in text


def test_report_cautions(rendered: tuple[Path, str]) -> None:
    _, text = rendered
    for caution in (*report.DEFAULT_CAUTIONS, "Recorder clocks were not disciplined."):
        assert html.escape(caution) in text
    lowered = text.lower()
    for phrase in ("non-causal", "pre-response", "onset", "real-time", "licensed practice", "local codes"):
        assert phrase in lowered


def test_overlay_shows_no_time_shift(rendered: tuple[Path, str]) -> None:
    # Reference: scipy.signal.sosfiltfilt is zero-phase, so the output's cross-correlation
    # with the input peaks at lag 0.
    _, text = rendered
    assert "lag of 0 samples" in text


def test_report_without_blocks_or_overlays(tmp_path: Path) -> None:
    design = fir_lowpass()
    out = report.render_report(tmp_path / "r.html", design_reports=[], designs=[design], files=[], blocks=[],
                               overlays=[], title="empty", cautions=[])
    text = out.read_text(encoding="utf-8")
    parsed = _Collector()
    parsed.feed(text)
    assert len(parsed.images) == 3
    assert "No blocks recorded." in text
    for caution in report.DEFAULT_CAUTIONS:
        assert html.escape(caution) in text


def test_response_figure_png() -> None:
    png = report.response_figure_png(bandpass())
    assert png.startswith(PNG_SIGNATURE)
    assert mpimg.imread(io.BytesIO(png), format="png").ndim == 3


def test_two_pass_impulse_matches_forward_backward_sosfilt() -> None:
    # Reference: scipy.signal.sosfilt over an impulse in the middle of zeros, forward, then
    # over the time-reversed result, reversed back: forward-backward filtering by definition.
    design = bandpass()
    t, g = report.two_pass_impulse(design)
    m = (g.size - 1) // 2
    assert t[m] == 0.0 and g.size == 2 * design.effective_length + 1
    np.testing.assert_allclose(g, g[::-1], rtol=0, atol=1e-15 * np.abs(g).max())  # symmetric about t = 0
    x = np.zeros(4 * m + 1)
    x[2 * m] = 1.0
    ref = signal.sosfilt(design.sos, signal.sosfilt(design.sos, x)[::-1])[::-1]
    np.testing.assert_allclose(g, ref[m : 3 * m + 1], rtol=0, atol=1e-9 * np.abs(ref).max())
    assert np.abs(g[:m]).max() > 1e-3 * np.abs(g).max()  # a visible pre-response before t = 0


def _browser() -> str | None:
    for name in ("/usr/bin/chromium", "chromium", "chromium-browser", "google-chrome"):
        found = shutil.which(name)
        if found:
            return found
    return None


def test_report_renders_in_headless_chromium(rendered: tuple[Path, str], tmp_path: Path) -> None:
    browser = _browser()
    if browser is None:
        pytest.skip("no Chromium or Chrome on PATH to render the report headless; "
                    "install one with `apt-get install chromium`")
    path, _ = rendered
    proc = subprocess.run(
        [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--dump-dom", "--enable-logging=stderr", "--v=0", f"--user-data-dir={tmp_path / 'profile'}",
         path.resolve().as_uri()],
        capture_output=True, text=True, timeout=120,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert "<h1>" in proc.stdout and "Block check map" in proc.stdout
    assert proc.stdout.count("<img") == 8
    console = [line for line in proc.stderr.splitlines()
               if re.search(r"CONSOLE|Uncaught|Failed to load resource|Not allowed to load", line)]
    assert not console, "\n".join(console)


def test_the_report_reads_each_block_table_once(tmp_path: Path, monkeypatch) -> None:
    # Status, block map and largest transient all need the block tables; on archives of
    # thousands of files each Zarr read counts, so the report reads every table once.
    from conftest import make_signal, write_config, write_stream
    from twinpass.config import load_config
    from twinpass.io.store import OutputStore
    from twinpass.job import run_job
    from twinpass.report_data import write_report

    write_stream(tmp_path / "archive", "deck", make_signal(6000, 2, 200.0, seed=3), 200.0, [2000, 2000, 2000])
    cfg = load_config(write_config(tmp_path, archive={"root": str(tmp_path / "archive")}))
    assert run_job(cfg).ok
    reads: list[str] = []
    real = OutputStore.read_block_table

    def counting(self, name, **kw):
        reads.append(name)
        return real(self, name, **kw)

    monkeypatch.setattr(OutputStore, "read_block_table", counting)
    path = write_report(cfg, tmp_path / "report.html")
    assert path.is_file() and "deck" in path.read_text()
    assert len(reads) == 3 and len(set(reads)) == 3  # three files, one read each


def test_the_report_passes_over_inputs_gone_since_they_were_filtered(tmp_path: Path) -> None:
    # The largest transient is shown from the input and the output side by side; an input
    # removed from the archive since its output was written is passed over for the next
    # largest peak, and with none left the report has no overlay, rather than failing.
    from conftest import make_signal, write_config, write_stream
    from twinpass.config import load_config
    from twinpass.job import run_job
    from twinpass.report_data import _largest_transient, write_report
    from twinpass.io.store import OutputStore

    x = make_signal(6000, 2, 200.0, seed=3)
    x[4500, 0] += 50.0  # the largest peak, in the third file
    files = write_stream(tmp_path / "archive", "deck", x, 200.0, [2000, 2000, 2000])
    cfg = load_config(write_config(tmp_path, archive={"root": str(tmp_path / "archive")}))
    assert run_job(cfg).ok
    store = OutputStore.open(cfg.store_location, mode="r")
    names = store.list_arrays()
    assert _largest_transient(cfg, store, names)["file"].startswith(files.relpaths[2])
    files.paths[2].unlink()
    shown = _largest_transient(cfg, store, names)
    assert shown is not None and shown["file"].split(" ")[0] in files.relpaths[:2]
    for p in files.paths[:2]:
        p.unlink()
    assert _largest_transient(cfg, store, names) is None
    assert write_report(cfg, tmp_path / "report.html").is_file()


def _run_small_job(folder: Path, response: dict | None = None) -> Path:
    """Three files of one 200 Hz stream filtered into ``folder/out.zarr``; the config's path."""
    from conftest import make_signal, write_config, write_stream
    from twinpass.config import load_config
    from twinpass.job import run_job

    write_stream(folder / "archive", "deck", make_signal(6000, 2, 200.0, seed=3), 200.0, [2000, 2000, 2000])
    path = write_config(folder, response=response)
    assert run_job(load_config(path)).ok
    return path


def test_the_report_draws_the_design_the_outputs_were_filtered_with(tmp_path: Path) -> None:
    # The configuration's passband is changed after the run and not rerun: the report draws
    # the design recorded with the outputs, not the configuration's, and says they differ.
    from conftest import BANDPASS, write_config
    from twinpass.config import load_config
    from twinpass.core.design import design_filter, per_pass_response
    from twinpass.io.store import OutputStore
    from twinpass.report_data import output_designs, write_report
    from twinpass.status import collect_status

    _run_small_job(tmp_path)
    store = OutputStore.open(str(tmp_path / "out.zarr"), mode="r")
    names = store.list_arrays()
    recorded = store.array_attrs(names[0])["filter"]
    changed = dict(BANDPASS, cutoff_hz=[5.0, 30.0])
    cfg = load_config(write_config(tmp_path, response=changed))

    designs, unrecorded = output_designs(cfg, store, collect_status(store)["files"])
    assert len(designs) == 1 and not unrecorded
    drawn = designs[0].design
    f = np.linspace(0.0, 100.0, 2001)
    # Reference: scipy.signal.sosfreqz of the SOS recorded with the outputs. Its plain
    # polynomial in float64 is itself off by up to 1.8e-11 of the value just above 0 Hz here
    # (against exact evaluation of the same coefficients), hence 1e-10.
    _, h_recorded = signal.sosfreqz(np.asarray(recorded["sos"]), worN=f, fs=200.0)
    np.testing.assert_allclose(per_pass_response(drawn, f), h_recorded, rtol=1e-10, atol=1e-14)
    assert drawn.effective_length == recorded["effective_length_samples"]
    assert designs[0].spec is not None and designs[0].spec["cutoff_hz"] == [2.0, 40.0]
    # The configuration's design now is another response (so drawing it would be wrong).
    _, h_now = signal.sosfreqz(design_filter(cfg.response, 200.0, 1e-9).sos, worN=f, fs=200.0)
    assert np.max(np.abs(np.abs(h_now) - np.abs(h_recorded))) > 0.1

    text = write_report(cfg, tmp_path / "report.html").read_text(encoding="utf-8")
    plain = html.unescape(text)
    assert 0 < text.index('<div class="notices">') < text.index("<h2>Summary</h2>")
    assert "The configuration now asks for a bandpass response (butterworth family), order 2 per pass, cutoff 5-30 Hz" \
        in plain
    assert "were filtered with a bandpass response (butterworth family), order 2 per pass, cutoff 2-40 Hz" in plain
    assert "rerun to refilter" in plain
    assert f"effective length {recorded['effective_length_samples']} samples" in plain
    for caution in report.DEFAULT_CAUTIONS:  # the cautions stay
        assert html.escape(caution) in text

    # Unchanged configuration: no notice.
    same = write_report(load_config(write_config(tmp_path, response=BANDPASS)), tmp_path / "same.html")
    assert '<div class="notices">' not in same.read_text(encoding="utf-8")

    # A run of the changed configuration that recorded its start (the store's root now names
    # the new response) and stopped before it refiltered any file: each output recorded its
    # own response, so the design they were filtered with keeps its spec (and mask).
    from twinpass.job import begin_run, prepare

    writer = OutputStore.open(str(tmp_path / "out.zarr"), mode="a", archive_root=cfg.archive_root)
    with writer.lock("stopped-early"):
        begin_run(writer, prepare(cfg, writer))
    store = OutputStore.open(str(tmp_path / "out.zarr"), mode="r")
    assert store.read_root_info()["spec"]["response"]["cutoff_hz"] == [5.0, 30.0]
    designs, _ = output_designs(cfg, store, collect_status(store)["files"])
    assert len(designs) == 1 and designs[0].spec is not None and designs[0].spec["cutoff_hz"] == [2.0, 40.0]


def _colour_pixels(png: bytes, colour: str) -> int:
    rgb = np.asarray([int(colour[i:i + 2], 16) for i in (1, 3, 5)]) / 255.0
    pixels = mpimg.imread(io.BytesIO(png), format="png")[..., :3]
    return int(np.sum(np.all(np.abs(pixels - rgb) < 2.0 / 255.0, axis=-1)))


def test_the_report_shows_blocks_of_a_stopped_run_as_cancelled(tmp_path: Path) -> None:
    # Blocks whose tasks were cancelled when a run was stopped are recorded as the engine
    # records them (status error, the text of twinpass.engine.lost_task_error for a
    # cancelled task): not done, nothing failed. Reference: twinpass.status.collect_status,
    # which `twinpass status` prints, counts them as cancelled and not as failed.
    import concurrent.futures

    from twinpass.config import load_config
    from twinpass.core.checks import ERROR
    from twinpass.engine import lost_task_error
    from twinpass.io.store import BlockRecord, OutputStore
    from twinpass.report_data import write_report
    from twinpass.status import collect_status

    cfg = load_config(_run_small_job(tmp_path))
    store = OutputStore.open(cfg.store_location, mode="a")
    text = lost_task_error(concurrent.futures.CancelledError())
    stopped = 0
    for name in store.list_arrays():
        n = store.read_block_table(name, figures=False, seams=False).n_blocks
        store.record_blocks(name, [BlockRecord(i, ERROR, None, None, text) for i in range(n)])
        stopped += n
    totals = collect_status(OutputStore.open(cfg.store_location, mode="r"))["totals"]
    assert totals["blocks_cancelled"] == stopped and totals["blocks_failed"] == 0

    page = write_report(cfg, tmp_path / "report.html").read_text(encoding="utf-8")
    assert f"cancelled: {stopped}</span>" in page and "error: 0</span>" in page
    assert "a run was stopped before they finished" in page
    # The block map: the cancelled colour fills the bars; the error colour is only in the
    # legend, where it takes no more pixels than the pending colour (no block is pending).
    parsed = _Collector()
    parsed.feed(page)
    pngs = [base64.b64decode(src.split(",", 1)[1]) for src in parsed.images]
    block_map = next(p for p in pngs if _colour_pixels(p, report.STATUS_COLORS["cancelled"]) > 0)
    cancelled = _colour_pixels(block_map, report.STATUS_COLORS["cancelled"])
    error = _colour_pixels(block_map, report.STATUS_COLORS["error"])
    pending = _colour_pixels(block_map, report.STATUS_COLORS["pending"])
    assert 0 < error <= 1.5 * pending and cancelled > 10 * error, (cancelled, error, pending)


@pytest.fixture(scope="module")
def demo_report(tmp_path_factory: pytest.TempPathFactory) -> tuple[str, dict]:
    """The demo archive (one hour), run with the engine, and its report."""
    from twinpass.config import load_config
    from twinpass.demo import write_demo_archive
    from twinpass.io.store import OutputStore
    from twinpass.job import run_job
    from twinpass.report_data import write_report
    from twinpass.status import collect_status

    folder = tmp_path_factory.mktemp("demo")
    cfg = load_config(write_demo_archive(folder, hours=1))
    result = run_job(cfg)
    assert result.ok and len(result.invalid) == 1
    status = collect_status(OutputStore.open(cfg.store_location, mode="r"))
    return write_report(cfg, folder / "report.html").read_text(encoding="utf-8"), status


def test_the_report_names_the_input_the_run_left_out_and_why(demo_report: tuple[str, dict]) -> None:
    # Reference: the demo archive's abutment-west file is cut short mid-frame on purpose, and
    # twinpass.status.collect_status (what `twinpass status` prints) records it left out
    # with its reason and remedy; the report lists the same, escaped as HTML.
    page, status = demo_report
    (relpath, why), = status["left_out"].items()
    assert relpath.startswith("abutment-west/")
    parsed = _Collector()
    parsed.feed(page)
    assert "Left out, failed or missing" in parsed.headings
    section = page[page.index("<h2>Left out, failed or missing</h2>"):page.index("<h2>Before and after")]
    assert "Inputs left out by the last run" in section
    assert html.escape(f"{relpath}: {why}") in section
    assert "truncated" in why and '[archive] truncated = "warn"' in why
    assert '"warn"' not in section  # quotes escaped


def test_the_summaries_count_the_inputs_left_out_in_their_first_lines(demo_report: tuple[str, dict]) -> None:
    # The report's Summary and the totals line of `twinpass status` count the input the
    # demo's run left out (and the inputs it failed: none), not only the outputs made;
    # twinpass.status.collect_status's list of left-out inputs is the reference count.
    from twinpass.status import format_status

    page, status = demo_report
    assert len(status["left_out"]) == 1 and not status["failed_inputs"]
    summary = page[page.index("<h2>Summary</h2>"):page.index("<h2>Cautions</h2>")]
    first = summary[summary.index("<p>"):summary.index("</p>")]
    assert "inputs left out by the last run: 1, failed: 0" in first, first
    totals = next(line for line in format_status(status).splitlines() if line.startswith("files: "))
    assert "inputs left out by the last run: 1, failed: 0" in totals, totals
    assert status["totals"]["inputs_left_out"] == 1 and status["totals"]["inputs_failed"] == 0


def test_the_status_tables_figure_columns_give_their_units(demo_report: tuple[str, dict]) -> None:
    # Every column of figures names its unit (dB, degrees, a ratio, samples); the seam
    # mismatch is relative to the segment's input peak (twinpass.core.checks.seam_mismatch)
    # and the edge zone counts the file's samples at its start and end (the output's
    # edge_zone_samples attribute), which the line under the table says.
    from twinpass.status import format_status

    page, status = demo_report
    lines = format_status(status).splitlines()
    header = next(line for line in lines if line.startswith("FILE"))
    for column in ("PB DEV dB", "PHASE deg", "STOP dB", "SEAM rel", "EDGE ZONE samples"):
        assert column in header, header
    legend = next(line for line in lines if line.strip().startswith("(SEAM: "))
    assert "relative to the segment's input peak" in legend and "EDGE ZONE: samples" in legend, legend
    zones = {f["name"]: f["edge_zone_samples"] for f in status["files"]}
    row = next(line for line in lines if line.strip().startswith(next(iter(zones)) + " "))
    first = next(iter(zones.values()))
    assert f"{first[0]}/{first[1]}" in row.split(), row


def test_report_lists_are_capped_and_escaped(tmp_path: Path) -> None:
    # Huge archives: each list shows report.LISTED entries and counts the rest; entries are
    # text, escaped as HTML (reference: html.escape of the standard library).
    entries = [f"deck/rec_{i:05d}.wav: <cut short> & left out" for i in range(report.LISTED + 7)]
    out = report.render_report(tmp_path / "r.html", design_reports=[], designs=[], files=[], blocks=[], overlays=[],
                               title="lists", cautions=[], listed=[("Inputs left out by the last run", entries),
                                                                   ("Notes of the last run", [])])
    text = out.read_text(encoding="utf-8")
    assert f"Inputs left out by the last run: {len(entries)}" in text and "Notes of the last run" not in text
    assert html.escape(entries[report.LISTED - 1]) in text and html.escape(entries[report.LISTED]) not in text
    assert "... and 7 more" in text and "<cut short>" not in text
    empty = report.render_report(tmp_path / "e.html", design_reports=[], designs=[], files=[], blocks=[], overlays=[],
                                 title="none", cautions=[], listed=[("Notes of the last run", [])])
    assert "Nothing left out, failed, gone or missing" in empty.read_text(encoding="utf-8")


def test_the_design_note_counts_complete_and_incomplete_outputs_apart(tmp_path: Path, inject) -> None:
    # One of three files keeps failing a block (injected fault): its output is recorded with
    # the design but not complete. Reference: twinpass.status.collect_status, which
    # `twinpass status` prints, counts it as incomplete.
    from conftest import make_signal, write_config, write_stream
    from twinpass.config import load_config
    from twinpass.io.store import OutputStore
    from twinpass.job import run_job
    from twinpass.report_data import output_designs, write_report
    from twinpass.status import collect_status

    files = write_stream(tmp_path / "archive", "deck", make_signal(6000, 2, 200.0, seed=3), 200.0, [2000] * 3)
    inject([{"action": "raise", "file": files.arrays[1], "block": "*"}])
    cfg = load_config(write_config(tmp_path, engine={"retries": 0}))
    assert run_job(cfg).failed == [files.relpaths[1]]
    store = OutputStore.open(cfg.store_location, mode="r")
    status = collect_status(store)
    assert status["totals"]["files"] == 3 and status["totals"]["complete"] == 2
    text = html.unescape(write_report(cfg, tmp_path / "report.html").read_text(encoding="utf-8"))
    assert "Filtered 3 outputs at 200 Hz, 2 complete (e.g. " in text
    designs, _ = output_designs(cfg, store, status["files"])
    assert [(len(d.sources), d.complete) for d in designs] == [(3, 2)]


def test_two_stores_in_one_folder_keep_reports_of_their_own(tmp_path: Path) -> None:
    # Two configurations whose stores sit side by side: each default report is named after
    # its store, so the second does not overwrite the first (common practice: one output,
    # one name).
    from conftest import BANDPASS, write_config
    from twinpass.config import load_config
    from twinpass.job import run_job
    from twinpass.report_data import default_report_path, write_report

    first = load_config(_run_small_job(tmp_path))
    path = write_config(tmp_path, response=dict(BANDPASS, cutoff_hz=[5.0, 30.0]), output={"store": "narrow.zarr"})
    second = load_config(path.rename(tmp_path / "narrow.toml"))
    assert run_job(second).ok
    a, b = write_report(first), write_report(second)
    assert (a, b) == (tmp_path / "out.report.html", tmp_path / "narrow.report.html")
    assert "twinpass report: twinpass.toml" in a.read_text(encoding="utf-8")
    assert "twinpass report: narrow.toml" in b.read_text(encoding="utf-8")
    assert default_report_path(first) == a and default_report_path(second) == b


def test_report_cautions_carry_each_caution_of_the_readme(rendered: tuple[Path, str]) -> None:
    # Reference: the README's "Cautions" section; each of its cautions appears in the
    # report's own Cautions section (edge zones and keeping the raw archive included).
    _, text = rendered
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    theirs = readme.split("## Cautions", 1)[1].split("\n## ", 1)[0].lower()
    ours = html.unescape(text.split("<h2>Cautions</h2>", 1)[1].split("<h2>", 1)[0]).lower()
    for phrase in ("non-causal", "real-time alarms", "edge zone", "keep the raw archive", "local codes"):
        assert phrase in theirs and phrase in ours, phrase


def test_the_overlay_draws_the_input_as_recorded_and_says_what_it_removes(tmp_path: Path) -> None:
    # The input of the overlay is the file's own samples (reference: numpy.load of the NPY
    # input); the figure draws input and output each less its window mean and the caption
    # says so, with the means. Channels are counted from 0, as in twinpass's other messages.
    from conftest import make_signal, write_config, write_stream
    from twinpass.config import load_config
    from twinpass.io.store import OutputStore
    from twinpass.job import run_job
    from twinpass.report_data import _largest_transient, write_report

    x = make_signal(6000, 2, 200.0, seed=3) + 3.0  # an offset the band-pass removes
    x[3500, 1] += 50.0  # the largest peak: channel 1 (the second column), frame 1500 of the second file
    files = write_stream(tmp_path / "archive", "deck", x, 200.0, [2000, 2000, 2000])
    cfg = load_config(write_config(tmp_path, archive={"root": str(tmp_path / "archive")}))
    assert run_job(cfg).ok
    store = OutputStore.open(cfg.store_location, mode="r")
    shown = _largest_transient(cfg, store, store.list_arrays())
    assert shown is not None
    a, z = 1500 - 400, 1500 + 400  # OVERLAY_SECONDS = 4 s at 200 Hz around the peak
    assert shown["file"] == (f"{files.relpaths[1]} (channel 1, counted from 0; samples {a}-{z - 1}; t = 0 at the "
                             "input's largest excursion from its mean over the window shown)")
    np.testing.assert_array_equal(shown["before"], np.load(files.paths[1])[a:z, 1])
    text = html.unescape(write_report(cfg, tmp_path / "report.html").read_text(encoding="utf-8"))
    assert (f"Both traces are drawn less their mean over the window shown (input {np.mean(shown['before']):.4g}, "
            f"output {np.mean(shown['after']):.4g}, in input units)") in text


def test_the_overlays_title_fits_in_its_figure(tmp_path: Path) -> None:
    # A long file path and the window's description must not run off the image: the title's
    # extent, as matplotlib's Agg renderer lays it out, lies within the figure's.
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    t = np.arange(-400, 400) / 200.0
    label = ("abutment-west-upper-deck/abutment-west-upper-deck_20260301T020000.wav (channel 2, counted from 0; "
             "samples 273598-274397; t = 0 at the input's largest excursion from its mean over the window shown)")
    fig, _ = report._overlay_figure({"file": label, "t": t, "before": np.sin(t), "after": np.sin(t)})
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    title = fig.axes[0].title
    box = title.get_window_extent(canvas.get_renderer())
    assert 0 <= box.x0 and box.x1 <= fig.bbox.width and box.y1 <= fig.bbox.height, (box, fig.bbox)
    assert title.get_text().replace("\n", " ").endswith(label), title.get_text()


def test_the_report_says_which_runs_and_library_versions_wrote_the_outputs(tmp_path: Path) -> None:
    # Provenance as the installed packages' metadata gives it (importlib.metadata): the last
    # run, its versions, and outputs whose blocks were written with other versions. The
    # older version is written into one output's record by hand (an injected fault standing
    # for a store filtered before an upgrade).
    from importlib import metadata

    import zarr

    from twinpass.config import load_config
    from twinpass.report_data import write_report

    cfg = load_config(_run_small_job(tmp_path))
    g = zarr.open_group(str(cfg.store_location), mode="r")
    run_id = g["_twinpass/runs"].group_keys().__next__()
    text = html.unescape(write_report(cfg).read_text(encoding="utf-8"))
    assert "<h2>Provenance</h2>" in text and run_id in text
    assert f"scipy {metadata.version('scipy')}" in text and f"numba {metadata.version('numba')}" in text
    assert "Outputs written with other versions</th><td>none" in text

    name = "deck/deck_20260301T000010"
    arr = zarr.open_array(str(cfg.store_location), path=name, mode="r+")
    entry = arr.attrs["written_by"][0]
    arr.attrs["written_by"] = [{**entry, "versions": {**entry["versions"], "scipy": "1.0.0"}}]
    text = html.unescape(write_report(cfg).read_text(encoding="utf-8"))
    assert f"1: {name}: scipy 1.0.0 (now {metadata.version('scipy')})" in text


def test_the_overlay_puts_t0_and_its_marker_on_one_sample_of_a_drifting_input(tmp_path: Path) -> None:
    # A drifting input (a slow sine of large amplitude, as a temperature drift) with a modest
    # event: the title's t = 0 and the red marker must name the same sample, the largest
    # |input - mean over the window shown| (reference: numpy argmax of that, computed here on
    # the file's own samples, numpy.load of the NPY input).
    from conftest import write_config, write_stream
    from twinpass.config import load_config
    from twinpass.io.store import OutputStore
    from twinpass.job import run_job
    from twinpass.report_data import _largest_transient

    fs = 200.0
    n = 6000
    t = np.arange(n) / fs
    rng = np.random.default_rng(5)
    # Its crest at 18.75 s (frame 1750 of the second file) makes the peak block [1000, 2000) of
    # that file; the block's largest excursion from its median is at frame 1000, inside the file.
    drift = 2.0 + 6.0 * np.sin(2 * np.pi * 0.03 * t - 1.963)
    x = np.stack([drift + 0.05 * rng.standard_normal(n), 0.1 * rng.standard_normal(n)], axis=1)
    x[2300, 0] += 1.5  # an event riding on the drift
    files = write_stream(tmp_path / "archive", "deck", x, fs, [2000, 2000, 2000])
    cfg = load_config(write_config(tmp_path, archive={"root": str(tmp_path / "archive")}))
    assert run_job(cfg).ok
    store = OutputStore.open(cfg.store_location, mode="r")
    shown = _largest_transient(cfg, store, store.list_arrays())
    assert shown is not None
    m = re.search(r"samples (\d+)-(\d+); t = 0 at the input's largest excursion from its mean over the window "
                  r"shown\)", shown["file"])
    assert m is not None, shown["file"]
    a, z = int(m.group(1)), int(m.group(2)) + 1
    k = files.relpaths.index(shown["file"].split(" ")[0])
    raw = np.load(files.paths[k])[a:z, 0].astype(np.float64)
    np.testing.assert_array_equal(shown["before"], raw)
    j = int(np.argmax(np.abs(raw - raw.mean())))
    assert shown["t"][j] == 0.0  # t = 0 at that sample
    fig, _ = report._overlay_figure(shown)
    markers = [ln for ln in fig.axes[0].get_lines() if str(ln.get_label()).startswith("largest |input")]
    assert len(markers) == 1 and markers[0].get_xdata()[0] == 0.0  # the marker too


def test_status_tells_apart_designs_at_rates_alike_to_six_digits() -> None:
    # A rate of 200.00000001 Hz (a sidecar's) gets its own design, as 200 Hz does; "%g" (six
    # significant digits) shows both as 200, Python's repr the shortest text that reads back
    # as the same float (Python documentation, floating-point repr).
    from twinpass.status import limits_line

    rates = (200.0, 200.00000001, 1e-3, 44100.0)
    lines = [limits_line({"sample_rate_hz": fs, "outputs": 1, "limits": None, "note": "n"}) for fs in rates]
    heads = [line.split(" (", 1)[0] for line in lines]
    assert heads == ["limits at 200 Hz", "limits at 200.00000001 Hz", "limits at 0.001 Hz", "limits at 44100 Hz"]
    assert [float(h.split()[2]) for h in heads] == list(rates)


def test_the_report_and_status_show_the_limits_the_blocks_are_graded_against(tmp_path: Path) -> None:
    # Reference: the README's [checks] defaults and rule (a stopband fails below the spec's
    # stopband_attenuation_db less stopband_margin_db, 10 dB: 60 - 10 = 50 dB; the passband
    # deviation warns beyond ripple / 2 + 0.3 dB + passband_warn_db 0.5 dB = 1.05 dB and fails
    # beyond ripple / 2 + 0.3 dB + passband_fail_db 1.0 dB = 1.55 dB). The
    # report (parsed with html.parser via the page text) and `twinpass status` state them
    # per design, and say why a figure short of the spec can pass.
    from twinpass.config import load_config
    from twinpass.io.store import OutputStore
    from twinpass.report_data import write_report
    from twinpass.status import collect_status, format_status

    response = {"kind": "lowpass", "passband_hz": [20.0], "stopband_hz": [40.0], "passband_ripple_db": 0.5,
                "stopband_attenuation_db": 60.0}
    cfg = load_config(_run_small_job(tmp_path, response))
    text = html.unescape(write_report(cfg).read_text(encoding="utf-8"))
    section = text.split("<h4>Check limits</h4>", 1)[1].split("<h4>", 1)[0]
    rows = {re.sub(r"<[^>]+>", "|", r).strip("|").split("||")[0]: re.sub(r"<[^>]+>", "|", r).strip("|").split("||")
            for r in section.split("<tr>")[2:]}
    assert rows["stopband attenuation"][1:4] == ["dB", "-", "below 50"]
    assert rows["passband deviation"][1:4] == ["dB", "beyond ±1.05", "beyond ±1.55"]
    assert rows["passband phase"][1:4] == ["degrees", "beyond ±5", "beyond ±20"]
    assert rows["seam mismatch"][3].startswith("above 1e-08")  # 10 x the tolerance 1e-9
    assert "stopband_margin_db 10 dB" in rows["stopband attenuation"][4]
    assert "below the nominal spec but above that limit therefore passes" in section
    status = collect_status(OutputStore.open(cfg.store_location, mode="r"))
    (entry,) = status["limits"]["designs"]
    by = {r["figure"]: r for r in entry["limits"]}
    assert entry["sample_rate_hz"] == 200.0 and entry["outputs"] == 3
    assert (by["stopband_att_db"]["fail"], by["stopband_att_db"]["unit"]) == (pytest.approx(50.0), "dB")
    assert by["passband_dev_db"]["warn"] == pytest.approx(1.05)
    assert "last run recorded" in status["limits"]["checks_from"]
    assert "stopband attenuation fail below 50 dB" in format_status(status)
