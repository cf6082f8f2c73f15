"""Users, passwords, the session's signing secret, CSRF tokens and who may see which farm."""

from __future__ import annotations

import hmac
import os
import secrets
import tomllib
from dataclasses import dataclass
from pathlib import Path

from argon2 import PasswordHasher
from argon2.exceptions import InvalidHashError, VerificationError, VerifyMismatchError
from sqlalchemy import select
from sqlalchemy.orm import Session

from advisory import settings as settings_mod
from advisory.errors import InputError
from advisory.store.schema import Farm, WebUser, WebUserFarm

ROLES = ("agent", "grower")
#: File in the data folder that keeps a made-up signing secret between starts.
SECRET_FILE = "web-secret"
MIN_PASSWORD = 10

_hasher = PasswordHasher()


def hash_password(password: str) -> str:
    """An argon2id hash of the password (with its own salt)."""
    if len(password) < MIN_PASSWORD:
        raise InputError(f"the password must have at least {MIN_PASSWORD} characters", field="password")
    return _hasher.hash(password)


def check_password(stored_hash: str, password: str) -> bool:
    try:
        return _hasher.verify(stored_hash, password)
    except (VerifyMismatchError, VerificationError, InvalidHashError):
        return False


#: A hash to check against when the user name is unknown, so both cases take the same time.
_DUMMY_HASH = _hasher.hash(secrets.token_urlsafe(16))


def authenticate(session: Session, username: str, password: str) -> WebUser | None:
    user = session.scalar(select(WebUser).where(WebUser.username == username.strip()))
    if user is None:
        check_password(_DUMMY_HASH, password)
        return None
    return user if check_password(user.password_hash, password) else None


def signing_secret(data_home: Path | None = None) -> str:
    """The key that signs session cookies: ``ADVISORY_WEB_SECRET``, else ``[web] secret`` of the settings
    file, else a random key made on first use and kept in the data folder (file mode 0600)."""
    env = os.environ.get("ADVISORY_WEB_SECRET")
    if env:
        return env
    path = settings_mod._settings_file()
    if path is not None:
        with open(path, "rb") as fh:
            try:
                secret = tomllib.load(fh).get("web", {}).get("secret")
            except tomllib.TOMLDecodeError as exc:
                raise InputError(f"not valid TOML: {exc}", file=str(path)) from None
        if secret:
            return str(secret)
    home = data_home or settings_mod.data_home()
    file = home / SECRET_FILE
    if file.exists():
        text = file.read_text().strip()
        if text:
            return text
    home.mkdir(parents=True, exist_ok=True)
    secret = secrets.token_urlsafe(48)
    fd = os.open(file, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    with os.fdopen(fd, "w") as fh:
        fh.write(secret + "\n")
    return secret


def csrf_token(session_data: dict) -> str:
    """The session's CSRF token (made on first use)."""
    token = session_data.get("csrf")
    if not token:
        token = secrets.token_urlsafe(32)
        session_data["csrf"] = token
    return token


def csrf_ok(session_data: dict, sent: str | None) -> bool:
    token = session_data.get("csrf")
    return bool(token and sent and hmac.compare_digest(str(token), str(sent)))


@dataclass(frozen=True)
class Viewer:
    """The signed-in user as the pages need them: who, what role, which farms."""

    id: int
    username: str
    role: str
    #: Farm ids this user may see; None: every farm.
    farm_ids: frozenset[int] | None

    @property
    def is_agent(self) -> bool:
        return self.role == "agent"

    def sees(self, farm_id: int | None) -> bool:
        return farm_id is not None and (self.farm_ids is None or farm_id in self.farm_ids)

    def may_edit_block(self, farm_id: int) -> bool:
        """Stages and resending: agents of the farm."""
        return self.is_agent and self.sees(farm_id)

    def may_edit_recipient(self, farm_id: int) -> bool:
        """Recipients' channels: agents of the farm, and the farm's grower."""
        return self.sees(farm_id)


def viewer(session: Session, user_id: int | None) -> Viewer | None:
    if user_id is None:
        return None
    user = session.get(WebUser, int(user_id))
    if user is None:
        return None
    if user.role == "agent":
        ids = None if user.all_farms else frozenset(
            session.scalars(select(WebUserFarm.farm_id).where(WebUserFarm.user_id == user.id)))
    else:
        ids = frozenset([user.farm_id] if user.farm_id is not None else [])
    return Viewer(id=user.id, username=user.username, role=user.role, farm_ids=ids)


# ----------------------------------------------------------------------------- the users command

def add_user(session: Session, username: str, password: str, role: str, farms: list[str],
             all_farms: bool) -> WebUser:
    """Create a user in the session's transaction; bad input raises InputError naming the option."""
    username = username.strip()
    if not username or len(username) > 80 or any(c.isspace() for c in username):
        raise InputError("a user name is 1 to 80 characters without spaces", field="NAME")
    if role not in ROLES:
        raise InputError(f"role must be one of {', '.join(ROLES)}", field="--role")
    if session.scalar(select(WebUser.id).where(WebUser.username == username)) is not None:
        raise InputError(f"a user named '{username}' exists already (remove it first)", field="NAME")
    farm_rows = []
    for name in farms:
        farm = session.scalar(select(Farm).where(Farm.name == name))
        if farm is None:
            known = ", ".join(session.scalars(select(Farm.name).order_by(Farm.name))) or "none imported yet"
            raise InputError(f"no farm named '{name}' (farms: {known})", field="--farm")
        farm_rows.append(farm)
    if role == "grower":
        if all_farms or len(farm_rows) != 1:
            raise InputError("a grower has exactly one farm: give --farm NAME once", field="--farm")
    elif not all_farms and not farm_rows:
        raise InputError("an agent needs --farm NAME (once per farm) or --all-farms", field="--farm")
    elif all_farms and farm_rows:
        raise InputError("give either --all-farms or --farm, not both", field="--all-farms")
    user = WebUser(username=username, password_hash=hash_password(password), role=role,
                   all_farms=bool(all_farms and role == "agent"),
                   farm_id=farm_rows[0].id if role == "grower" else None)
    session.add(user)
    session.flush()
    if role == "agent":
        for farm in farm_rows:
            session.add(WebUserFarm(user_id=user.id, farm_id=farm.id))
    return user
