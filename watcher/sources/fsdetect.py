"""Tell whether a directory lives on a network file system.

inotify only sees changes made through the local kernel: on NFS, SMB/CIFS,
sshfs, 9p and similar mounts, a gauge PC writing to the share produces no
events here, so such directories must be polled.  The mount holding a path is
the mount whose mount point is the longest prefix of the path's real location
(Linux: ``/proc/self/mountinfo``, falling back to ``/proc/mounts``).

>>> text = ("22 1 8:1 / / rw,relatime - ext4 /dev/sda1 rw\\n"
...         "40 22 0:40 / /mnt/gauges rw - nfs4 plc:/export rw\\n")
>>> mounts = parse_mountinfo(text)
>>> mount_for("/mnt/gauges/line3/weights.csv", mounts).fstype
'nfs4'
>>> mount_for("/mnt/gaugesX/a.csv", mounts).fstype
'ext4'
>>> is_network_fstype("fuse.sshfs"), is_network_fstype("ext4")
(True, False)
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass

__all__ = ["Mount", "NETWORK_FSTYPES", "parse_mountinfo", "parse_proc_mounts", "mount_for",
           "is_network_fstype", "filesystem_type", "is_network_path"]

#: File system types whose changes may come from another machine (no inotify).
NETWORK_FSTYPES = frozenset({
    "nfs", "nfs4", "cifs", "smb", "smb3", "smbfs", "ncpfs", "afs", "coda", "9p",
    "fuse.sshfs", "sshfs", "fuse.s3fs", "fuse.rclone", "fuse.gcsfuse", "glusterfs",
    "fuse.glusterfs", "ceph", "fuse.ceph", "lustre", "gpfs", "ocfs2", "gfs2",
    "davfs", "fuse.davfs2", "fuse.smbnetfs", "beegfs", "virtiofs", "vboxsf", "fuse.vmhgfs-fuse",
})


@dataclass(frozen=True, slots=True)
class Mount:
    mount_point: str
    fstype: str
    source: str


_OCTAL = re.compile(r"\\([0-7]{3})")


def _unescape(field: str) -> str:
    # The kernel writes space, tab, newline and backslash as \040 \011 \012 \134.
    return _OCTAL.sub(lambda m: chr(int(m.group(1), 8)), field)


def parse_mountinfo(text: str) -> list[Mount]:
    """Mounts from ``/proc/self/mountinfo`` text (proc(5) layout).

    Fields: id, parent, major:minor, root, mount point, options, optional
    fields ended by ``-``, then file system type, source, super options.
    Malformed lines are skipped.
    """
    out: list[Mount] = []
    for line in text.splitlines():
        parts = line.split(" ")
        try:
            sep = parts.index("-", 6)
            out.append(Mount(_unescape(parts[4]), parts[sep + 1], _unescape(parts[sep + 2])))
        except (ValueError, IndexError):
            continue
    return out


def parse_proc_mounts(text: str) -> list[Mount]:
    """Mounts from ``/proc/mounts`` text (source, mount point, type, options...)."""
    out: list[Mount] = []
    for line in text.splitlines():
        parts = line.split()
        if len(parts) >= 3:
            out.append(Mount(_unescape(parts[1]), parts[2], _unescape(parts[0])))
    return out


def read_mounts() -> list[Mount]:
    """This process's mount table; empty when /proc is not available."""
    for path, parser in (("/proc/self/mountinfo", parse_mountinfo), ("/proc/mounts", parse_proc_mounts)):
        try:
            with open(path, encoding="utf-8", errors="replace") as fh:
                mounts = parser(fh.read())
        except OSError:
            continue
        if mounts:
            return mounts
    return []


def _is_prefix(mount_point: str, path: str) -> bool:
    if mount_point == "/":
        return path.startswith("/")
    return path == mount_point or path.startswith(mount_point.rstrip("/") + "/")


def mount_for(path: str, mounts: list[Mount]) -> Mount | None:
    """The mount holding ``path`` (longest mount-point prefix; the last one wins on ties,
    as a later mount over the same point hides the earlier)."""
    best: Mount | None = None
    for m in mounts:
        if _is_prefix(m.mount_point, path) and (best is None or len(m.mount_point) >= len(best.mount_point)):
            best = m
    return best


def is_network_fstype(fstype: str) -> bool:
    return fstype in NETWORK_FSTYPES


def _existing_real(path: str) -> str:
    # Use the nearest existing ancestor: a directory that does not exist yet
    # will be created on the file system of that ancestor.
    p = os.path.abspath(path)
    while not os.path.exists(p) and os.path.dirname(p) != p:
        p = os.path.dirname(p)
    return os.path.realpath(p)


def filesystem_type(path: str, mounts: list[Mount] | None = None) -> str | None:
    """File system type holding ``path`` (or its nearest existing ancestor)."""
    m = mount_for(_existing_real(path), read_mounts() if mounts is None else mounts)
    return m.fstype if m else None


def is_network_path(path: str, mounts: list[Mount] | None = None) -> bool:
    """True when ``path`` is on a network file system (unknown counts as local)."""
    fstype = filesystem_type(path, mounts)
    return fstype is not None and is_network_fstype(fstype)
