"""Where a job's files sit in a scan folder: the owner of their names.

A scan folder may hold the samples and checks of several jobs (and of several
workspaces), so each job has its own folder::

    SCAN/
      frames.jsonl, scan.json, ...      the scan (trainkit.screener.scan)
      jobs/<job>/sample.csv             the job's sampled cells, with a label column to fill
      jobs/<job>/verification.json      the job's latest check, with every earlier one listed
      jobs/<job>/verification.html      the same as a page

Earlier versions wrote ``SCAN/sample.csv`` and ``SCAN/verification.json|.html`` (one per
scan, replaced by the next job). Those files are never written again nor moved; a job
sampled then keeps working (its answers live in the workspace; its old ``sample.csv``
still imports, and ``trainkit sample --more`` carries the answers typed into it over).
"""

from __future__ import annotations

from pathlib import Path

__all__ = ["JobFiles", "JOBS_DIR", "SAMPLE_FILE", "VERIFICATION_FILE", "VERIFICATION_REPORT"]

#: Folder of a scan holding one folder per job.
JOBS_DIR = "jobs"
SAMPLE_FILE = "sample.csv"
VERIFICATION_FILE = "verification.json"
VERIFICATION_REPORT = "verification.html"


class JobFiles:
    """The files of one job in one scan folder (they need not exist yet).

    Args:
        scan_dir: the scan folder.
        job: the job's name (a checked token: see :func:`trainkit.core.textsafe.token_problem`).
    """

    def __init__(self, scan_dir: str | Path, job: str) -> None:
        self.scan_dir = Path(scan_dir)
        self.job = job

    @property
    def folder(self) -> Path:
        return self.scan_dir / JOBS_DIR / self.job

    @property
    def sample_csv(self) -> Path:
        return self.folder / SAMPLE_FILE

    @property
    def verification_json(self) -> Path:
        return self.folder / VERIFICATION_FILE

    @property
    def verification_html(self) -> Path:
        return self.folder / VERIFICATION_REPORT

    @property
    def legacy_sample_csv(self) -> Path:
        """Where versions before per-job folders wrote every job's sample (read only)."""
        return self.scan_dir / SAMPLE_FILE
