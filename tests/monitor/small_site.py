"""A small ingested site for tests of the watch: the demo site (invented data), two days
at 10-minute steps, ingested from its CSV exports into a SQLite store.

`ingested_site` builds it once per test module; `copy_site` gives each test its own copy
of the folder (site file, exports and store), so tests that change alarms or move the
exports do not see each other.
"""

from __future__ import annotations

import shutil
from pathlib import Path

from adapters.base import open_store
from monitor.config import Site, load_site
from monitor.demo import prepare_demo
from monitor.ingest import ingest, open_source

DAYS = 2


def ingested_site(folder: Path) -> Path:
    """Build and ingest the demo site in *folder*; returns the site file."""
    paths = prepare_demo(folder / "site", days=DAYS, step_s=600.0)
    site = load_site(paths.site_file)
    store = open_store(site.store_url)
    source = open_source(site)
    try:
        ingest(site, store, source)
    finally:
        source.close()
        store.close()
    return paths.site_file


def copy_site(site_file: Path, dest: Path) -> tuple[Path, Site]:
    """A private copy of the site folder; returns its site file and the loaded site."""
    shutil.copytree(site_file.parent, dest)
    copied = dest / site_file.name
    return copied, load_site(copied)
