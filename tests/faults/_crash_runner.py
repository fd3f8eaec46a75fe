"""Run the timbrel command line in this process with one fault injected from outside.

Usage: python _crash_runner.py [--as-user UID] [--peak-to FILE] FAULT [timbrel arguments...]

``--peak-to FILE`` writes this process's peak resident memory in bytes (VmHWM from
/proc/self/status, which execve resets, unlike ru_maxrss) to FILE when the command ends.

``--as-user UID`` drops root's privileges (setgid/setuid) once timbrel and everything it
loads are imported, so the run is refused what an ordinary user is refused. (The
interpreter itself may live where that user may not look, hence the late drop.)

FAULT is ``none`` or ``ACTION:WHEN:PATTERN:N``:

- ``kill:before:PATTERN:N`` / ``kill:after:PATTERN:N`` send SIGKILL to this process just
  before / just after the N-th ``os.replace`` onto a file whose name matches the glob
  PATTERN (every timbrel output is published by a rename, so these are the moments
  between one finished file and the next);
- ``kill:epoch:-:N`` sends SIGKILL after the first minibatch of epoch N (0-based), i.e.
  in the middle of training between two checkpoints;
- ``pause:after:PATTERN:N`` creates ``$FAULT_DIR/paused`` after that rename and waits
  until ``$FAULT_DIR/go`` exists (to hold a run, and its locks, at a known point);
- ``killmain``, ``intmain``, ``termmain`` (with ``before``/``after``) send SIGKILL,
  SIGINT or SIGTERM to this runner's own process (the run's main process) from whichever
  process reaches the point, usually a worker: the main process alone is hit, as by the
  out-of-memory killer or ``kill PID``; ``intgroup`` sends SIGINT to the run's whole
  process group, as Ctrl-C at a terminal does. Each worker counts its own renames
  (from the count at the moment it was forked), so ``N`` is the first worker's N-th.

Nothing in timbrel is changed: the hooks wrap ``os.replace`` and ``RBM.fit_epoch`` from
the outside, in this child only. The kill is a real ``kill -9`` (SIGKILL cannot be caught,
so no cleanup code of timbrel runs).
"""

from __future__ import annotations

import fnmatch
import os
import signal
import sys
import time

MAIN = os.getpid()
#: what each action does: a signal to the main process (or its group with ``intgroup``)
SIGNALS = {"killmain": signal.SIGKILL, "intmain": signal.SIGINT, "termmain": signal.SIGTERM,
           "intgroup": signal.SIGINT}


def _die() -> None:
    os.kill(os.getpid(), signal.SIGKILL)


def _hit_main(action: str) -> None:
    if action == "intgroup":
        os.killpg(os.getpgid(MAIN), signal.SIGINT)
    else:
        os.kill(MAIN, SIGNALS[action])


def _install(fault: str) -> None:
    action, when, pattern, count = fault.split(":")
    target = int(count)
    if when == "epoch":
        from timbrel.model import RBM

        real_fit_epoch = RBM.fit_epoch

        def fit_epoch(self, make_batches, *, epoch):  # type: ignore[no-untyped-def]
            if epoch != target:
                return real_fit_epoch(self, make_batches, epoch=epoch)

            def batches():  # type: ignore[no-untyped-def]
                for i, batch in enumerate(make_batches()):
                    if i == 1:
                        _die()
                    yield batch

            return real_fit_epoch(self, batches, epoch=epoch)

        RBM.fit_epoch = fit_epoch  # type: ignore[method-assign]
        return

    real_replace = os.replace
    seen = 0

    def replace(src, dst, *args, **kwargs):  # type: ignore[no-untyped-def]
        nonlocal seen
        hit = fnmatch.fnmatch(os.path.basename(os.fsdecode(dst)), pattern)
        if hit:
            seen += 1
        if hit and seen == target and when == "before":
            if action == "kill":
                _die()
            elif action in SIGNALS:
                _hit_main(action)
        real_replace(src, dst, *args, **kwargs)
        if hit and seen == target and when == "after":
            if action == "kill":
                _die()
            if action in SIGNALS:
                _hit_main(action)
                return
            folder = os.environ["FAULT_DIR"]
            open(os.path.join(folder, "paused"), "w").close()
            deadline = time.monotonic() + 300
            while not os.path.exists(os.path.join(folder, "go")):
                if time.monotonic() > deadline:
                    raise SystemExit("runner: nobody said go within 300 s")
                time.sleep(0.02)

    os.replace = replace


def _drop_privileges(uid: int) -> None:
    # the command line and whatever the run loads later are imported while the
    # interpreter's own files are still readable; the drop happens as the command's
    # library function starts, after option parsing
    import concurrent.futures  # noqa: F401
    import encodings.cp437  # noqa: F401  (zip member names)
    import fcntl  # noqa: F401
    import mmap  # noqa: F401
    import multiprocessing  # noqa: F401

    import soxr  # noqa: F401

    import timbrel.cache
    import timbrel.cli
    import timbrel.export
    import timbrel.training

    def dropping(function):  # type: ignore[no-untyped-def]
        def run(*args, **kwargs):  # type: ignore[no-untyped-def]
            os.setgroups([])
            os.setgid(uid)
            os.setuid(uid)
            return function(*args, **kwargs)
        return run

    timbrel.cache.build_cache = dropping(timbrel.cache.build_cache)
    timbrel.export.export = dropping(timbrel.export.export)


def main() -> int:
    # A shell without job control starts background commands with SIGINT ignored, and
    # Python then never raises KeyboardInterrupt; a run at a terminal has the default
    # handler, so the runner restores it whatever way the test suite was started.
    signal.signal(signal.SIGINT, signal.default_int_handler)
    argv = sys.argv[1:]
    if argv[0] == "--as-user":
        _drop_privileges(int(argv[1]))
        argv = argv[2:]
    peak_to = None
    if argv[0] == "--peak-to":
        peak_to, argv = argv[1], argv[2:]
    fault, *args = argv
    if fault != "none":
        _install(fault)
    from timbrel.cli import main as timbrel_main

    code = timbrel_main(args)
    if peak_to:
        with open("/proc/self/status") as fh:
            kib = next(int(line.split()[1]) for line in fh if line.startswith("VmHWM:"))
        with open(peak_to, "w") as fh:
            fh.write(str(kib * 1024))
    return code


if __name__ == "__main__":
    sys.exit(main())
