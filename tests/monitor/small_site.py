"""A small ingested site for tests of the watch: the demo site (invented data), two days
at 10-minute steps, ingested from its CSV exports into a SQLite store.

`ingested_site` builds it once per test module; `copy_site` gives each test its own copy
of the folder (site file, exports and store), so tests that change alarms or move the
exports do not see each other. `example_site` writes the example site
(config/example-site.toml) under another name, with simulated exports, for tests that
need more than one site.
"""

from __future__ import annotations

import os
import re
import shutil
from datetime import UTC, datetime
from pathlib import Path

from adapters.base import open_store
from monitor.app.demo import EXAMPLE_SITE, prepare_demo, simulate_site, write_exports
from monitor.app.ingest import ingest, open_source
from monitor.site.config import Site, load_site

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


def example_site(folder: Path, name: str, start: datetime, end: datetime, *, seed: int,
                 store: tuple[str, str] | None = None) -> Path:
    """The example site named *name* in *folder* (its site file returned), with CSV
    exports simulated over [*start*, *end*) at 10-minute steps from *seed*, dropped in its
    inbox an hour ago (settled). *store*: (url, schema) of its ``[store]`` instead of the
    example's SQLite file."""
    folder.mkdir(parents=True)
    text = re.sub(r'(?m)^name = ".*"$', f'name = "{name}"', EXAMPLE_SITE.read_text(), count=1)
    if store is not None:
        text = text.replace('url = "sqlite:///var/branchwatch.db"',
                            f'url = "{store[0]}"\nschema = "{store[1]}"')
    path = folder / "site.toml"
    path.write_text(text)
    site = load_site(path)
    write_exports(site, simulate_site(site, start, end, step_s=600.0, seed=seed),
                  folder / "inbox")
    settled = datetime.now(UTC).timestamp() - 3600
    for p in (folder / "inbox").iterdir():
        os.utime(p, (settled, settled))
    return path
