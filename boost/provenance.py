"""Where a run came from: the protocol file's place in git, and the software it ran on.

Everything here describes; nothing raises for a missing git or a folder outside a work
tree (the answer is then ``None``), except :func:`read_protocol_at_commit`, which a
user asks for explicitly and which raises :class:`~boost.exceptions.InputError`.
``git`` runs as a subprocess with a time limit; boost needs no git library.
"""

import platform as host_platform
import socket
import subprocess
import sys
from importlib import metadata as package_metadata
from pathlib import Path

from .exceptions import InputError

#: Packages whose versions a run folder records.
PACKAGES = ("boost", "openmm", "numpy", "pymbar", "mdtraj", "scipy", "pint")
#: Seconds one git call may take before it is abandoned (a hung network file system).
GIT_TIMEOUT = 10.0


def _git(args, folder, *, text=True):
    """Run ``git -C folder ARGS``; the finished process, or None when git cannot run.

    ``text=False`` keeps stdout as bytes (a file's content, decoded by the caller).
    """
    decoding = {"encoding": "utf-8", "errors": "replace"} if text else {}
    try:
        return subprocess.run(["git", "-C", str(folder), *args], capture_output=True,
                              timeout=GIT_TIMEOUT, stdin=subprocess.DEVNULL, **decoding)
    except (OSError, subprocess.SubprocessError):   # no git, not executable, timed out
        return None


def _locate(path):
    """(work tree top, path relative to it in POSIX form), or None outside a work tree."""
    path = Path(path).resolve()
    if not path.parent.is_dir():
        return None
    found = _git(["rev-parse", "--show-toplevel"], path.parent)
    if found is None or found.returncode != 0 or not found.stdout.strip():
        return None
    top = Path(found.stdout.strip()).resolve()
    try:
        return top, path.relative_to(top).as_posix()
    except ValueError:            # the file resolves outside the tree (a symlinked folder)
        return None


def describe_git(path):
    """The git state of a protocol file, for a run folder's provenance.

    Parameters
    ----------
    path : path-like
        The protocol file.

    Returns
    -------
    dict or None
        ``{"commit": HEAD sha (None before the first commit), "path_in_repo": path
        relative to the work tree's top (POSIX), "uncommitted_changes": whether the
        file differs from HEAD or is not in HEAD at all}``; None when the file is not
        in a git work tree or git cannot run.
    """
    located = _locate(path)
    if located is None:
        return None
    top, relative = located
    head = _git(["rev-parse", "--verify", "--quiet", "HEAD"], top)
    if head is None:
        return None
    commit = head.stdout.strip() if head.returncode == 0 else None
    return {"commit": commit, "path_in_repo": relative,
            "uncommitted_changes": commit is None or _differs_from_head(top, relative)}


def _differs_from_head(top, relative):
    """Whether the work-tree file differs from HEAD's, or HEAD lacks it (untracked, new)."""
    in_head = _git(["cat-file", "-e", f"HEAD:{relative}"], top)
    if in_head is None or in_head.returncode != 0:
        return True
    diff = _git(["diff", "--quiet", "--no-ext-diff", "--no-textconv", "HEAD", "--", relative], top)
    return diff is None or diff.returncode != 0


def read_protocol_at_commit(path, revision):
    """The text of the protocol file ``path`` as committed at ``revision``.

    Parameters
    ----------
    path : path-like
        The protocol file's place in the work tree (it need not exist there now).
    revision : str
        Anything git accepts as a commit: a sha, a tag, a branch, ``HEAD~2``.

    Returns
    -------
    text : str
        The file's text at that commit (newlines as Python reads text files).
    commit : str
        The full sha of the commit.

    Raises
    ------
    InputError
        git cannot run, the file is outside a work tree, the revision names no commit,
        or the commit lacks the file.
    """
    path = Path(path)
    located = _locate(path)
    if located is None:
        if _git(["--version"], Path.cwd()) is None:
            raise InputError(f"{path}: reading it at commit '{revision}' needs git, which cannot be run here.")
        raise InputError(f"{path}: is not in a git work tree, so it has no commit '{revision}'.")
    top, relative = located
    found = None
    if revision and not revision.startswith("-"):       # never let a revision pass as an option
        found = _git(["rev-parse", "--verify", "--quiet", f"{revision}^{{commit}}"], top)
    if found is None or found.returncode != 0:
        raise InputError(f"{path}: --commit must name a commit of the repository at {top}. "
                         f"Got '{revision}', which git does not know.")
    commit = found.stdout.strip()
    shown = _git(["show", f"{commit}:{relative}"], top, text=False)
    if shown is None or shown.returncode != 0:
        raise InputError(f"{path}: commit {commit[:12]} holds no file {relative}.")
    try:
        text = shown.stdout.decode("utf-8")
    except UnicodeDecodeError:
        raise InputError(f"{path}: at commit {commit[:12]} is not UTF-8 text.") from None
    # newlines as read_text gives them, so the protocol hash matches a copy read from disk
    return text.replace("\r\n", "\n").replace("\r", "\n"), commit


def describe_environment():
    """Package versions, Python, host and machine, for a run folder's provenance.

    Returns
    -------
    dict
        ``{"versions": {package: version or None}, "python": "3.11.2", "host": host
        name, "machine": platform text}``; the keys run folders already use.
    """
    versions = {}
    for name in PACKAGES:
        try:
            versions[name] = package_metadata.version(name)
        except package_metadata.PackageNotFoundError:
            versions[name] = None
    return {"versions": versions, "python": sys.version.split()[0], "host": socket.gethostname(),
            "machine": host_platform.platform()}
