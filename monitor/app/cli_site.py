"""What the single-site verbs of the command line share: the site file of the verb's
CONFIG argument, its results store and readings source opened, times given on the
command line read in site time, and the errors a user can fix (`UserError`, and the one
line `error_text` prints for each).

Errors a user can fix — a bad config, an unreachable database, an impossible what-if —
print one line naming the cause and exit with status `EXIT_USAGE`; a bug still shows its
traceback (`monitor.app.cli.main`).
"""

from __future__ import annotations

import argparse
import logging
from datetime import datetime
from typing import Any

import pandas as pd

from adapters.base import BranchwatchAdapterError, ReadingsSource, ResultsStore, open_store
from adapters.credentials import mask_secrets
from monitor.site.config import ConfigError, Site, load_site

log = logging.getLogger(__name__)

__all__ = [
    "EXIT_OK",
    "EXIT_USAGE",
    "UserError",
    "error_text",
    "notifiers",
    "open_site",
    "operator_name",
    "parse_time",
    "site_of",
    "site_store",
    "store_text",
]

EXIT_OK = 0
EXIT_USAGE = 2


class UserError(Exception):
    """An error the user can fix; printed as one line, exit status 2."""


def error_text(exc: Exception, args: argparse.Namespace) -> str:
    """The message of a user-fixable error, masked; one line (a config file with several
    mistakes gives one line for each). An adapter error that names a site-file setting
    gets the file in front, as config errors have it."""
    text = str(exc).strip()
    if not isinstance(exc, ConfigError):
        lines = text.splitlines() or [type(exc).__name__]
        if len(lines) > 1:
            log.debug("full error text: %s", text)
        text = lines[0]
        setting = getattr(exc, "setting", None)
        config = getattr(args, "config", None)
        if setting and config is not None and not text.startswith(str(config)):
            text = f"{config}: {text}"
    return mask_secrets(text)


def site_of(args: argparse.Namespace) -> Site:
    """The validated site of the verb's CONFIG argument (`ConfigError` names file and key)."""
    return load_site(args.config)


def site_store(site: Site) -> ResultsStore:
    """The site's own results store, in the schema its ``[store] schema`` names."""
    return open_store(site.store_url, schema=site.store_schema)


def store_text(site: Site) -> str:
    """The site's store for a message: its URL, passwords masked, and its schema."""
    schema = f", schema {site.store_schema}" if site.store_schema else ""
    return mask_secrets(site.store_url) + schema


def open_site(site: Site, *, shared: tuple[str, str] | None = None
              ) -> tuple[ResultsStore, ReadingsSource]:
    """The site's store and readings source; bad [source] settings (an unset url_env, a
    secrets file that is missing, unreadable, open to others or holds no URL, a missing
    driver) become one `UserError` line naming the file and key. *shared* (URL, schema):
    a fleet's shared store, used instead of the site's own."""
    from monitor.app.ingest import open_source

    store = (site_store(site) if shared is None
             else open_store(shared[0], schema=shared[1]))
    try:
        source = open_source(site)
    except (ValueError, ImportError) as exc:
        store.close()
        if isinstance(exc, BranchwatchAdapterError):
            raise
        text = str(exc)
        if not text.startswith(str(site.path)):
            key, sep, _ = text.partition(": ")
            in_source = sep and key.replace("_", "").isalnum()
            text = f"{site.path}: source{'.' if in_source else ': '}{text}"
        raise UserError(text) from None
    except Exception:
        store.close()
        raise
    return store, source


def parse_time(text: str, site: Site, what: str) -> datetime:
    """A date or ISO time from the command line; naive means the site's local time."""
    try:
        ts = pd.Timestamp(text)
    except (ValueError, TypeError):
        raise UserError(f"{what} {text!r} is not a date or ISO time (e.g. 2026-05-01)") from None
    if ts.tzinfo is None:
        ts = ts.tz_localize(site.timezone, nonexistent="raise", ambiguous="raise")
    return ts.tz_convert("UTC").to_pydatetime()


def notifiers(site: Site) -> list[Any]:
    """The senders of the site's ``[notify]`` section (`monitor.app.notifications`); a bad
    setting in it is a `UserError`."""
    from monitor.app.notifications import build_notifiers

    try:
        return list(build_notifiers(site))
    except ValueError as exc:
        raise UserError(str(exc)) from None


def operator_name(args: argparse.Namespace) -> str:
    """Who runs the command: ``--by``, else the login name ('unknown' when there is none)."""
    if args.by:
        return str(args.by)
    import getpass

    try:
        return getpass.getuser() or "unknown"
    except (OSError, KeyError):
        return "unknown"
