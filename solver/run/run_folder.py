"""The run folder: which folders eddybox may replace, and the lock a running run holds on its
folder.

* A folder eddybox creates as a run folder gets a marker file, `.eddybox-run`. `--overwrite`
  replaces only a marked folder whose every entry is one eddybox writes (`foreign_entries`),
  never the current folder or one above it, and never before every other check has passed.
* A run holds an exclusive `flock` on `.eddybox-lock` in its folder for as long as it runs; the
  file names its PID, host and start time. `run`, `--overwrite`, `--restart` and
  `inspect --repair` on a locked folder are refused; `inspect` calls its run "running". The
  kernel drops the lock when the process ends, however it ends (SIGKILL included).
* A restart from an older checkpoint moves the checkpoints and field snapshots of the abandoned
  future (steps after the restart point) to `checkpoints/set-aside-<time>/` and
  `fields/set-aside-<time>/`, and removes the temporary files of writes that were killed.
"""
from __future__ import annotations

import datetime
import errno
import fcntl
import os
import re
import shutil
import socket
import time

from eddybox.solver import __version__
from eddybox.solver.errors import ConfigError

MARKER = ".eddybox-run"
LOCK = ".eddybox-lock"
#: marks a folder `eddybox report` wrote (it writes again only into such a folder, or a new one)
REPORT_MARKER = ".eddybox-report"
#: bookkeeping files: a folder holding only these holds no run
BOOKKEEPING = (MARKER, LOCK)

# what eddybox writes in a run folder: name patterns of files, and of folders with their own
# patterns (`report/` is the demo's report)
_CHECKPOINT = r"checkpoint_\d+\.h5"
_FIELD = r"field_\d+\.(?:h5|xdmf)"
_SET_ASIDE = r"set-aside-[0-9TZ.\-]+"
_FILES = re.compile(r"(?:config\.yaml(?:\.tmp\d+)?|log\.txt"
                    r"|(?:fluid|particles|pairs|collisions)\.h5(?:\.rebuild|\.repair)?|"
                    + re.escape(MARKER) + "|" + re.escape(LOCK) + ")")
_FOLDERS = {
    "checkpoints": (re.compile(_CHECKPOINT + r"(?:\.tmp\d+)?"), {_SET_ASIDE: re.compile(_CHECKPOINT)}),
    "fields": (re.compile(r"field_\d+\.h5(?:\.tmp)?|" + _FIELD), {_SET_ASIDE: re.compile(_FIELD)}),
    "report": (re.compile(r"[A-Za-z0-9_.=+\-]+\.(?:html|csv|png)|" + re.escape(REPORT_MARKER)), {}),
}
#: temporary files left by writes that were killed (removed when a run takes its folder over)
_TEMPORARY = re.compile(r".*\.h5\.(?:tmp\d*|rebuild|repair)|config\.yaml\.tmp\d+")


# --- what is in a folder ---------------------------------------------------------------------------
def _entries(folder):
    try:
        return sorted(os.scandir(folder), key=lambda e: e.name)
    except OSError as exc:
        raise ConfigError(f"{folder}: cannot read the folder ({exc.strerror})") from None


def _is_file(entry) -> bool:
    return entry.is_file(follow_symlinks=False)


def _is_dir(entry) -> bool:
    return entry.is_dir(follow_symlinks=False)


def foreign_entries(folder) -> list[str]:
    """Paths (relative to `folder`) that eddybox did not write there: any file or folder whose
    name or kind is not one of a run folder's, and any symbolic link."""
    out = []
    for e in _entries(folder):
        if _is_file(e) and _FILES.fullmatch(e.name):
            continue
        if _is_dir(e) and e.name in _FOLDERS:
            files, subs = _FOLDERS[e.name]
            for s in _entries(e.path):
                if _is_file(s) and files.fullmatch(s.name):
                    continue
                sub = next((p for pat, p in subs.items() if re.fullmatch(pat, s.name)), None)
                if _is_dir(s) and sub is not None:
                    out += [f"{e.name}/{s.name}/{x.name}" for x in _entries(s.path)
                            if not (_is_file(x) and sub.fullmatch(x.name))]
                    continue
                out.append(f"{e.name}/{s.name}")
            continue
        out.append(e.name)
    return out


def holds_run(folder) -> bool:
    """True when `folder` holds anything but the bookkeeping files (or is not empty)."""
    return any(e.name not in BOOKKEEPING for e in _entries(folder))


def is_marked(folder) -> bool:
    return os.path.isfile(os.path.join(folder, MARKER))


def _inside(path, parent) -> bool:
    """True when `path` is `parent` or lies below it (real paths)."""
    path, parent = os.path.realpath(path), os.path.realpath(parent)
    return path == parent or path.startswith(parent.rstrip(os.sep) + os.sep)


def _few(names, k=3) -> str:
    shown = ", ".join(names[:k])
    return shown + (f" and {len(names) - k} more" if len(names) > k else "")


# --- the lock ---------------------------------------------------------------------------------------
def _describe(info: dict) -> str:
    pid = info.get("pid", "?")
    host = info.get("host")
    since = info.get("started")
    return f"PID {pid}" + (f" on {host}" if host and host != socket.gethostname() else "") + \
        (f", started {since}" if since else "")


def _read_lock(path) -> dict:
    try:
        with open(path, errors="replace") as fh:
            text = fh.read(4096)
    except OSError:
        return {}
    info = {}
    for line in text.splitlines():
        if ":" in line:
            k, v = line.split(":", 1)
            info[k.strip()] = v.strip()
    return info


def lock_holder(folder) -> dict | None:
    """{'pid', 'host', 'started'} of the run holding `folder`'s lock, or None when no run
    does. Probes with a shared lock that is released at once; creates nothing."""
    path = os.path.join(folder, LOCK)
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return None
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
        except BlockingIOError:
            return _read_lock(path) or {"pid": "?"}
        except OSError:  # a file system without locks: nothing can be said
            return None
        fcntl.flock(fd, fcntl.LOCK_UN)
        return None
    finally:
        os.close(fd)


def refuse_if_locked(folder, what: str):
    """ConfigError naming the PID when a run holds `folder`."""
    holder = lock_holder(folder) if os.path.isdir(folder) else None
    if holder is not None:
        raise ConfigError(f"{folder}: a running eddybox holds this folder ({_describe(holder)}); "
                          f"{what} is refused while it runs. Wait for it to end, or stop it with "
                          f"kill -TERM {holder.get('pid', '<pid>')} (it writes a checkpoint)")


class RunLock:
    """The exclusive lock of a run on its folder, held from `acquire` to `release`."""

    #: attempts (every 20 ms) before giving up: an `inspect` probe holds a shared lock briefly
    ATTEMPTS = 10

    def __init__(self, folder):
        self.folder = str(folder)
        self.path = os.path.join(self.folder, LOCK)
        self.fd = None
        self.warning = None

    def acquire(self, command: str = "run"):
        try:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            raise ConfigError(f"{self.folder}: cannot create the lock file {LOCK} "
                              f"({exc.strerror})") from None
        for attempt in range(self.ATTEMPTS):
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                if attempt + 1 < self.ATTEMPTS:
                    time.sleep(0.02)
                    continue
                os.close(fd)
                refuse_if_locked(self.folder, command)
                raise ConfigError(f"{self.folder}: locked by another eddybox process") from None
            except OSError as exc:  # e.g. ENOLCK on a file system without locks
                self.warning = (f"warning: cannot lock {self.path} ({exc.strerror}); a second "
                                "run on this folder would not be refused")
                break
        self.fd = fd
        text = (f"pid: {os.getpid()}\nhost: {socket.gethostname()}\nstarted: {_now()}\n"
                f"command: eddybox {command}\n")
        try:
            os.ftruncate(fd, 0)
            os.pwrite(fd, text.encode(), 0)
        except OSError:
            pass  # the lock holds without its description
        return self

    def __del__(self):  # a Simulation dropped without close() must not keep the lock
        self.release()

    def release(self):
        if self.fd is not None:
            try:
                fcntl.flock(self.fd, fcntl.LOCK_UN)
            except OSError:
                pass
            os.close(self.fd)
            self.fd = None


def _now() -> str:
    return datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds")


# --- taking a folder for a run ----------------------------------------------------------------------
def check_output(out, overwrite: bool, restart: bool):
    """Every check of the output folder that changes nothing: a run in it needs --overwrite
    or --restart, --overwrite needs a folder eddybox made with nothing foreign in it, and no
    running eddybox may hold it. ConfigError names the folder and what to do."""
    out = str(out)
    if os.path.lexists(out) and not os.path.isdir(out):
        raise ConfigError(f"{out}: output path exists and is not a folder")
    if not os.path.isdir(out):
        if restart:
            raise ConfigError(f"--restart: output folder {out} has no run to continue")
        _check_creatable(out)
        return
    if restart or overwrite or holds_run(out):
        refuse_if_locked(out, "--restart" if restart else "--overwrite" if overwrite else "a second run")
    if restart:
        if not holds_run(out):
            raise ConfigError(f"--restart: output folder {out} has no run to continue")
        return
    if not holds_run(out):
        return
    if not overwrite:
        raise ConfigError(f"{out}: output folder exists and is not empty; use --overwrite to "
                          "replace it or --restart latest to continue it")
    check_replaceable(out)


def check_replaceable(out):
    """ConfigError unless --overwrite may empty `out`."""
    if _inside(os.getcwd(), out):
        what = "is the current folder" if _inside(out, os.getcwd()) else "contains the current folder"
        raise ConfigError(f"{out}: --overwrite refused: the output folder {what}; choose "
                          "another --out")
    if not is_marked(out):
        raise ConfigError(f"{out}: --overwrite refused: not a run folder made by eddybox (no "
                          f"{MARKER} marker); remove it yourself or choose another --out")
    foreign = foreign_entries(out)
    if foreign:
        raise ConfigError(f"{out}: --overwrite refused: the folder holds files eddybox did not "
                          f"write ({_few(foreign)}); move them away or choose another --out")


def _check_creatable(out):
    """ConfigError when the folder `out` could never be made (a name too long, a parent that
    is a file or not writable) - found without creating anything."""
    path = os.path.abspath(out)
    for part in path.split(os.sep):
        if len(part.encode()) > 255:
            raise ConfigError(f"{out}: cannot create the output folder (a name of "
                              f"{len(part.encode())} bytes; at most 255)")
    parent = path
    while not os.path.exists(parent):
        parent = os.path.dirname(parent)
    if not os.path.isdir(parent):
        raise ConfigError(f"{out}: cannot create the output folder ({parent} is not a folder)")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise ConfigError(f"{out}: cannot create the output folder ({parent} is not writable)")


def take(out, overwrite: bool, restart: bool, command="run") -> tuple[RunLock, list[str]]:
    """Create or take over `out` for a run after `check_output` and every other check have
    passed: create the folder and its marker, take the lock, then (with the lock) empty the
    folder for --overwrite. Returns the lock and lines for the run log."""
    out = str(out)
    notes = []
    try:
        os.makedirs(out, exist_ok=True)
    except OSError as exc:
        raise ConfigError(f"{out}: cannot create the output folder ({exc.strerror})") from None
    fresh = not holds_run(out)
    if fresh and not is_marked(out):
        try:
            with open(os.path.join(out, MARKER), "w") as fh:
                fh.write(f"eddybox run folder: made by eddybox {__version__} at {_now()}.\n"
                         "eddybox run --overwrite may replace this folder only while it holds "
                         "nothing but eddybox's own files.\n")
        except OSError as exc:
            raise ConfigError(f"{out}: cannot write in the output folder ({exc.strerror})") from None
    lock = RunLock(out).acquire(command)
    try:
        if lock.warning:
            notes.append(lock.warning)
        if overwrite and not restart and holds_run(out):
            check_replaceable(out)  # again, now that no other eddybox can change it
            for e in _entries(out):
                if e.name in BOOKKEEPING:
                    continue
                if _is_dir(e):
                    shutil.rmtree(e.path)
                else:
                    os.remove(e.path)
            notes.append(f"--overwrite: removed the previous run's files from {out}")
    except BaseException:
        lock.release()
        raise
    return lock, notes


def _step_of(name):
    m = re.search(r"_(\d+)\.", name)
    return int(m.group(1)) if m else None


def set_aside_after(out, step: int) -> list[str]:
    """Move checkpoints and field snapshots of steps after `step` (the future a restart from
    an older checkpoint abandons) to a `set-aside-<time>` folder beside them; return log lines."""
    notes = []
    stamp = datetime.datetime.now(datetime.timezone.utc).strftime("%Y%m%dT%H%M%S.%fZ")
    for sub, pattern in (("checkpoints", _CHECKPOINT), ("fields", _FIELD)):
        folder = os.path.join(out, sub)
        if not os.path.isdir(folder):
            continue
        later = [e.name for e in _entries(folder) if _is_file(e) and re.fullmatch(pattern, e.name)
                 and _step_of(e.name) > step]
        if not later:
            continue
        aside = os.path.join(folder, f"set-aside-{stamp}")
        os.makedirs(aside, exist_ok=True)
        for name in later:
            os.replace(os.path.join(folder, name), os.path.join(aside, name))
        notes.append(f"restart from step {step}: moved {len(later)} {sub[:-1]} file(s) of later "
                     f"steps ({_few(later, 2)}) to {aside}")
    return notes


def remove_temporaries(out) -> list[str]:
    """Remove the temporary files of killed writes (`*.h5.tmp<pid>`, `*.h5.rebuild`, ...)."""
    removed = []
    for folder in (out, os.path.join(out, "checkpoints"), os.path.join(out, "fields")):
        if not os.path.isdir(folder):
            continue
        for e in _entries(folder):
            if _is_file(e) and _TEMPORARY.fullmatch(e.name):
                try:
                    os.remove(e.path)
                    removed.append(os.path.relpath(e.path, out))
                except OSError as exc:
                    if exc.errno != errno.ENOENT:
                        raise
    return [f"removed {len(removed)} temporary file(s) left by killed writes: {_few(removed)}"] \
        if removed else []


def folder_of(path) -> str:
    """The run folder a file of a run lives in (the file's folder, or the one above for
    checkpoints/ and fields/)."""
    parent = os.path.dirname(os.path.abspath(path))
    if os.path.basename(parent) in ("checkpoints", "fields") or \
            re.fullmatch(_SET_ASIDE, os.path.basename(parent)):
        while os.path.basename(parent) not in ("checkpoints", "fields") and parent != "/":
            parent = os.path.dirname(parent)
        parent = os.path.dirname(parent)
    return parent
