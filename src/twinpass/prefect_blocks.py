"""Prefect plug-in: a Block type holding a saved twinpass job configuration.

Registered through the ``prefect.collections`` entry point, so a Prefect server lists the
block type; a configuration saved with ``twinpass save CONFIG --name NAME`` (or
``TwinpassJob(...).save("NAME")``) can be seen and edited on the dashboard and named
when a deployment runs (``config_block="NAME"``).
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, ClassVar

from prefect.blocks.core import Block
from pydantic import Field

if TYPE_CHECKING:
    from .config import JobConfig
# The configuration module (and numpy through it) is imported by the methods that need it:
# Prefect's server imports this module to register the block type, at every start of its
# temporary server, and needs only the class (0.08-0.1 s of CPU saved there).


class TwinpassJob(Block):
    """A saved twinpass job: the TOML configuration of a zero-phase filtering run over an
    archive, and the folder its relative paths resolve against."""

    _block_type_name: ClassVar[str] = "Twinpass Job"
    _block_type_slug: ClassVar[str] = "twinpass-job"
    _logo_url: ClassVar[str | None] = None  # no hosted logo yet; the packaged one is assets/logo.png
    _documentation_url: ClassVar[str] = "https://twinpass.invalid/docs/saved-jobs"
    _description: ClassVar[str] = (
        "A saved twinpass job configuration (TOML): the overall zero-phase response, the archive, "
        "the output Zarr store and the engine settings."
    )
    _code_example: ClassVar[str] = '''```python
from twinpass.prefect_blocks import TwinpassJob

twinpass_job_block = TwinpassJob.load("BLOCK_NAME")
config = twinpass_job_block.to_job_config()
```'''

    config_toml: str = Field(
        default=...,
        description="The job configuration as TOML text, exactly as in a twinpass.toml file.",
        json_schema_extra={"format": "textarea"},
    )
    base_dir: str = Field(
        default=".",
        description="Folder that relative paths in the configuration resolve against.",
    )

    @classmethod
    def from_file(cls, path: str | Path) -> "TwinpassJob":
        """Read and validate a configuration file into a block (not yet saved)."""
        from .config import load_config

        cfg = load_config(path)
        return cls(config_toml=cfg.text, base_dir=str(cfg.base_dir))

    def to_job_config(self) -> JobConfig:
        """Validate the stored TOML and return the :class:`~twinpass.config.JobConfig`."""
        from .config import parse_config

        return parse_config(self.config_toml, base_dir=self.base_dir, source=f"block {self._block_document_name or '<unsaved>'}")
