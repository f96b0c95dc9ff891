"""Paths in the site file stay inside the site folder.

What is allowed (decided here and in `monitor/site/config.py`): the source folder's pattern,
the report folder, the SQLite store and every ``secrets_file`` (store, source, e-mail,
webhook) must lie inside the folder of the site file, unless ``[site]
allow_paths_outside = true`` says the plant keeps them elsewhere on purpose. A secrets
file is read with the service's rights (often root at install time), so
``secrets_file = "../../etc/shadow"`` must not even be opened; where it is allowed, its
content is never quoted in an error. Pattern: tests/adapters for the CSV pattern.
"""

from __future__ import annotations

import copy
import tomllib
from pathlib import Path
from typing import Any

import pytest

from monitor.site import config
from monitor.site.config import ConfigError, parse_site

EXAMPLE = tomllib.loads(
    (Path(__file__).parents[2] / "config" / "example-site.toml").read_text(encoding="utf-8"))
OUTSIDE = "../../../../../../../../etc/shadow"


def _with(where: str, value: str) -> dict[str, Any]:
    doc = copy.deepcopy(EXAMPLE)
    if where == "store":
        doc["store"] = {"secrets_file": value}
    elif where == "source":
        doc["source"] = {"kind": "sql", "table": "hist", "secrets_file": value}
    else:
        part = {"email": {"host": "mail.example", "sender": "bw@example", "to": ["a@example"],
                          "username": "bw", "secrets_file": value},
                "webhook": {"secrets_file": value}}[where]
        doc["notify"] = {where: part}
    return doc


@pytest.mark.parametrize("where", ["store", "source", "email", "webhook"])
def test_a_secrets_file_outside_the_site_folder_is_refused(tmp_path: Path, where: str,
                                                            monkeypatch: pytest.MonkeyPatch
                                                            ) -> None:
    opened: list[Any] = []
    monkeypatch.setattr(config, "read_url", lambda **kw: opened.append(kw) or "sqlite://")
    doc = _with(where, OUTSIDE)
    with pytest.raises(ConfigError) as caught:
        parse_site(doc, path=tmp_path / "site.toml")
    message = str(caught.value)
    key = {"email": "notify.email", "webhook": "notify.webhook"}.get(where, where)
    assert f"{key}.secrets_file" in message and "leads outside the site folder" in message
    assert len(message.splitlines()) == 1
    assert opened == []  # not even opened


def test_allowed_outside_the_content_is_never_quoted(tmp_path: Path) -> None:
    secret = tmp_path / "elsewhere" / "store.secret"
    secret.parent.mkdir()
    secret.write_text("root:$6$notaurl$Zm9vYmFy:19000:0:99999:7:::\n")
    secret.chmod(0o600)
    site = tmp_path / "site" / "site.toml"
    site.parent.mkdir()
    doc = _with("store", "../elsewhere/store.secret")
    with pytest.raises(ConfigError, match="leads outside"):
        parse_site(doc, path=site)
    doc["site"]["allow_paths_outside"] = True
    with pytest.raises(ConfigError) as caught:
        parse_site(doc, path=site)
    assert "not a database URL" in str(caught.value)
    assert "Zm9vYmFy" not in str(caught.value) and "root:" not in str(caught.value)


def test_a_secrets_file_inside_is_read(tmp_path: Path) -> None:
    secret = tmp_path / "store.secret"
    secret.write_text(f"sqlite:///{tmp_path / 'bw.db'}\n")
    secret.chmod(0o600)
    site = parse_site(_with("store", "store.secret"), path=tmp_path / "site.toml")
    assert site.store_url.endswith("bw.db")
