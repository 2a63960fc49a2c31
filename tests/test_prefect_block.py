"""The TwinpassJob Block type: Prefect's own block standard checks, the plug-in entry point,
and a saved configuration round trip through a real temporary Prefect server.

Reference: ``prefect.testing.standard_test_suites.BlockStandardTestSuite`` (Prefect's own
checks for integration blocks: description, documentation URL, field descriptions, code
example, logo).
"""

from __future__ import annotations

import dataclasses
import http.server
import importlib.metadata
import importlib.resources
import threading
from typing import Iterator

import pytest

pytest.register_assert_rewrite("prefect_fixtures")  # helpers with asserts, loaded as a plug-in too
from prefect_fixtures import STREAMS, check_against_sosfiltfilt, write_job
from prefect.testing.standard_test_suites import BlockStandardTestSuite
from twinpass import cli, flows
from twinpass.config import load_config
from twinpass.errors import ConfigError
from twinpass.prefect_blocks import TwinpassJob

# The Prefect fixtures (one temporary server for the whole session) come from this plug-in.
pytest_plugins = ("prefect_fixtures",)


@pytest.fixture
def packaged_logo_url() -> Iterator[str]:
    """URL of the packaged logo (twinpass/assets/logo.png), served from 127.0.0.1.

    Prefect's logo check downloads ``_logo_url`` with ``urlopen``; the tests run without
    network access, so the same file the package ships is served locally instead.
    """
    assets = importlib.resources.files("twinpass") / "assets"
    assert (assets / "logo.png").is_file(), "twinpass/assets/logo.png is not installed with the package"
    folder = str(assets)

    class Quiet(http.server.SimpleHTTPRequestHandler):
        def __init__(self, *a, **kw):
            super().__init__(*a, directory=folder, **kw)

        def log_message(self, *a) -> None:  # keep the test output clean
            pass

    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Quiet)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}/logo.png"
    finally:
        server.shutdown()
        server.server_close()
        thread.join()


class TestTwinpassJobBlockStandards(BlockStandardTestSuite):
    @pytest.fixture
    def block(self) -> type[TwinpassJob]:
        return TwinpassJob

    def test_has_a_valid_image(self, block: type[TwinpassJob], packaged_logo_url: str,
                               monkeypatch: pytest.MonkeyPatch) -> None:
        # Only the logo's address changes, for this check only (see packaged_logo_url).
        monkeypatch.setattr(block, "_logo_url", packaged_logo_url)
        super().test_has_a_valid_image(block)


def test_entry_point_registers_the_block_module():
    from prefect.plugins import load_prefect_collections

    eps = {ep.name: ep.value for ep in importlib.metadata.entry_points(group="prefect.collections")}
    assert eps.get("twinpass") == "twinpass.prefect_blocks"
    loaded = load_prefect_collections()
    assert getattr(loaded.get("twinpass"), "TwinpassJob", None) is TwinpassJob


def test_invalid_toml_names_the_block():
    job = TwinpassJob(config_toml="[response]\nkind = 3\n", base_dir=".")
    with pytest.raises(ConfigError, match=r"block <unsaved>: \[response\] kind"):
        job.to_job_config()


def test_saved_job_round_trips_and_the_flow_runs_it(prefect_client, npy_archive, tmp_path, monkeypatch):
    monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "INFO")  # main() sets it when unset; keep the env as it was
    cfg_path = write_job(tmp_path, npy_archive)
    original = load_config(cfg_path)

    # `twinpass save CONFIG --name NAME`, against the test server.
    assert cli.main(["save", str(cfg_path), "--name", "tp-round-trip"]) == 0
    assert prefect_client.read_block_type_by_slug("twinpass-job").name == "Twinpass Job"
    doc = prefect_client.read_block_document_by_name("tp-round-trip", block_type_slug="twinpass-job")
    assert doc.data["config_toml"] == cfg_path.read_text(encoding="utf-8")

    loaded = TwinpassJob.load("tp-round-trip").to_job_config()
    assert loaded.source == "block tp-round-trip"
    assert dataclasses.replace(loaded, source=original.source) == original
    assert loaded.digest() == original.digest()

    state = flows.archive_run(config_block="tp-round-trip", report=False, return_state=True)
    assert state.is_completed(), state.message
    assert state.result()["counts"]["complete"] == 6
    for stream in STREAMS:
        check_against_sosfiltfilt(str(tmp_path / "out.zarr"), npy_archive, stream)


def test_flow_needs_exactly_one_configuration(prefect_server):
    state = flows.archive_run(return_state=True)
    assert state.is_failed() and "give config_path" in state.message
    state = flows.archive_run(config_path="a.toml", config_block="b", return_state=True)
    assert state.is_failed() and "not both" in state.message


def test_saving_a_missing_file_exits_2(tmp_path, monkeypatch, capsys):
    monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "INFO")  # main() sets it when unset; keep the env as it was
    missing = tmp_path / "missing.toml"
    assert cli.main(["save", str(missing), "--name", "tp-missing"]) == 2
    assert f"{missing}: configuration file not found" in capsys.readouterr().err


def test_cli_runs_a_saved_block(prefect_server, npy_archive, tmp_path, monkeypatch, capsys):
    monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "INFO")  # main() sets it when unset; keep the env as it was
    cfg_path = write_job(tmp_path, npy_archive)
    assert cli.main(["save", str(cfg_path), "--name", "tp-cli-block"]) == 0
    assert "twinpass run --block tp-cli-block" in capsys.readouterr().out
    assert cli.main(["run", "--block", "tp-cli-block", "--no-report"]) == 0
    assert "complete 6" in capsys.readouterr().out
    for stream in STREAMS:
        check_against_sosfiltfilt(str(tmp_path / "out.zarr"), npy_archive, stream)
    # exactly one configuration source
    assert cli.main(["run", str(cfg_path), "--block", "tp-cli-block"]) == 2
    assert cli.main(["run", "--block", "tp-cli-block", "--no-flow"]) == 2
