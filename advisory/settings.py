"""Settings: database URL, data folder, mail and webhook settings.

Resolution order for each value: command-line option, environment variable,
optional settings file (TOML), built-in default.

Environment variables
---------------------
``ADVISORY_DB``
    SQLAlchemy URL of the database (default: an SQLite file in the data folder).
``ADVISORY_HOME``
    The data folder (default: ``$XDG_DATA_HOME/advisory`` or ``~/.local/share/advisory``).
``ADVISORY_SETTINGS``
    Path of a TOML settings file (default: ``<data folder>/settings.toml`` if present).
``ADVISORY_SMTP_HOST``, ``ADVISORY_SMTP_PORT``, ``ADVISORY_SMTP_USER``, ``ADVISORY_SMTP_PASSWORD``,
``ADVISORY_SMTP_FROM``, ``ADVISORY_SMTP_STARTTLS``
    Outgoing mail.  The password is read only from the environment or the
    settings file; it is never stored in the database nor logged.
``ADVISORY_WEBHOOK_SECRET``
    Key for the HMAC signature on webhook deliveries.
``ADVISORY_OUTBOX``
    Folder where every notice is written as a file (default: ``<data folder>/outbox``).
"""

from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from advisory.errors import InputError


def data_home() -> Path:
    """The data folder: ``ADVISORY_HOME``, else the XDG data folder."""
    if os.environ.get("ADVISORY_HOME"):
        return Path(os.environ["ADVISORY_HOME"]).expanduser()
    xdg = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    return Path(xdg) / "advisory"


def default_db_url() -> str:
    return f"sqlite:///{data_home() / 'advisory.sqlite'}"


def _settings_file() -> Path | None:
    env = os.environ.get("ADVISORY_SETTINGS")
    if env:
        p = Path(env).expanduser()
        if not p.exists():
            raise InputError("settings file not found", file=str(p))
        return p
    p = data_home() / "settings.toml"
    return p if p.exists() else None


def _load_file() -> dict:
    p = _settings_file()
    if p is None:
        return {}
    try:
        with open(p, "rb") as fh:
            return tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"not valid TOML: {exc}", file=str(p)) from None


@dataclass(frozen=True)
class SmtpSettings:
    host: str | None = None
    port: int = 587
    user: str | None = None
    password: str | None = field(default=None, repr=False)
    sender: str = "advisory@localhost"
    starttls: bool = True


@dataclass(frozen=True)
class Settings:
    db_url: str
    data_home: Path
    outbox: Path
    smtp: SmtpSettings
    webhook_secret: str | None = field(default=None, repr=False)


def _truthy(v) -> bool:
    return str(v).strip().lower() in {"1", "true", "yes", "on"}


def load(db_url: str | None = None) -> Settings:
    """Resolve the settings.

    Parameters
    ----------
    db_url : str, optional
        A database URL from the command line; wins over everything else.
    """
    f = _load_file()
    home = data_home()
    mail = f.get("smtp", {})
    env = os.environ
    smtp = SmtpSettings(
        host=env.get("ADVISORY_SMTP_HOST") or mail.get("host"),
        port=int(env.get("ADVISORY_SMTP_PORT") or mail.get("port", 587)),
        user=env.get("ADVISORY_SMTP_USER") or mail.get("user"),
        password=env.get("ADVISORY_SMTP_PASSWORD") or mail.get("password"),
        sender=env.get("ADVISORY_SMTP_FROM") or mail.get("from", "advisory@localhost"),
        starttls=_truthy(env.get("ADVISORY_SMTP_STARTTLS", mail.get("starttls", True))),
    )
    return Settings(
        db_url=db_url or env.get("ADVISORY_DB") or f.get("database", {}).get("url") or default_db_url(),
        data_home=home,
        outbox=Path(env.get("ADVISORY_OUTBOX") or f.get("outbox", {}).get("path") or home / "outbox"),
        smtp=smtp,
        webhook_secret=env.get("ADVISORY_WEBHOOK_SECRET") or f.get("webhook", {}).get("secret"),
    )
