"""Who may read what the service writes: nobody but its own user, unless ``--group`` says so.

Private by default: the root is made ``0700`` and the service and its workers run with umask
``077``, so every file they create (the ledger, submitted job files, outputs, logs, reports) is
``0600`` and every folder ``0700``. With ``--group NAME`` the root belongs to that group and
carries the set-group-id bit, so everything created beneath it belongs to the group too
(Linux and the BSDs give a new file its folder's group); the umask is ``027``: files ``0640``,
folders ``0750`` (``2750`` with the set-group-id bit), readable by the group's members, written
only by the service.

The writers of the package create files with ``open()``/pyarrow, which honour the umask; the
worker sets it again itself (:func:`apply_umask`) rather than rely on what the fork server
inherited.
"""

from __future__ import annotations

import grp
import os
import stat
from dataclasses import dataclass
from pathlib import Path

from ..errors import ConfigError


@dataclass(frozen=True)
class Privacy:
    """The modes the service gives what it writes."""

    group: str | None = None
    gid: int | None = None

    @property
    def umask(self) -> int:
        return 0o027 if self.group else 0o077

    @property
    def file_mode(self) -> int:
        return 0o640 if self.group else 0o600

    @property
    def dir_mode(self) -> int:
        """Permission bits of folders (the set-group-id bit is added with a group)."""
        return 0o750 if self.group else 0o700

    def describe(self) -> str:
        if self.group:
            return f"files 0640, folders 0750, group {self.group}"
        return "files 0600, folders 0700 (private to this user)"


def privacy_for(group: str | None) -> Privacy:
    """Check ``--group NAME`` (it must exist, and this user must belong to it)."""
    if not group:
        return Privacy()
    try:
        entry = grp.getgrnam(group)
    except KeyError:
        raise ConfigError(f"--group {group}: no such group on this machine") from None
    if os.geteuid() != 0 and entry.gr_gid not in (os.getegid(), *os.getgroups()):
        raise ConfigError(f"--group {group}: this user is not a member of it, so the service "
                          f"cannot give its files to it")
    return Privacy(group=group, gid=entry.gr_gid)


def apply_umask(privacy: Privacy) -> None:
    os.umask(privacy.umask)


def secure_root(root: Path, privacy: Privacy) -> list[str]:
    """Give ``root`` and what is already in it the modes of ``privacy``.

    Returns what was changed (a service started on an older, world-readable root says so).
    The modes only ever get tighter (or group-readable with ``--group``); nothing is followed
    outside the root (symbolic links are left alone).
    """
    changed: list[str] = []
    for folder, dirs, files in os.walk(root):
        entries = [(Path(folder), True)] + [(Path(folder) / f, False) for f in files]
        for path, is_dir in entries:
            try:
                info = path.lstat()
            except FileNotFoundError:
                continue
            if stat.S_ISLNK(info.st_mode):
                continue
            want = privacy.dir_mode if is_dir else privacy.file_mode
            if is_dir and privacy.gid is not None:
                want |= stat.S_ISGID
            if privacy.gid is not None and info.st_gid != privacy.gid:
                os.chown(path, -1, privacy.gid)
                changed.append(f"{path}: group {privacy.group}")
            if stat.S_IMODE(info.st_mode) != want:
                os.chmod(path, want)
                changed.append(f"{path}: {stat.S_IMODE(info.st_mode):04o} -> {want:04o}")
        dirs[:] = [d for d in dirs if not (Path(folder) / d).is_symlink()]
    return changed


__all__ = ["Privacy", "privacy_for", "apply_umask", "secure_root"]
