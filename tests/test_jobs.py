"""Work run elsewhere: children end with their parent, however the parent ends."""

import os
import signal
import subprocess
import sys
import textwrap
import time

import pytest

PARENT = textwrap.dedent("""
    import os, sys, time
    from workbench import jobs

    def pid_then_wait():
        return os.getpid()

    if __name__ == "__main__":
        pool = jobs.pool(1, sys.argv[1])
        print(pool.submit(pid_then_wait).result(), flush=True)
        time.sleep(120)
""")


def _alive(pid: int) -> bool:
    try:
        with open(f"/proc/{pid}/status") as f:
            state = next(line for line in f if line.startswith("State:"))
    except (FileNotFoundError, ProcessLookupError):
        return False
    return " Z " not in state and "zombie" not in state  # an unreaped zombie has ended


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
@pytest.mark.parametrize("context", ["spawn", "forkserver"])
@pytest.mark.parametrize("sig", [signal.SIGKILL, signal.SIGTERM])
def test_pool_workers_end_within_five_seconds_of_their_parent(tmp_path, context, sig):
    script = tmp_path / "parent.py"
    script.write_text(PARENT)
    parent = subprocess.Popen([sys.executable, str(script), context], stdout=subprocess.PIPE, text=True)
    try:
        worker = int(parent.stdout.readline())
        assert _alive(worker)
        os.kill(parent.pid, sig)
        parent.wait(10)
        deadline = time.monotonic() + 5.0  # the target in issue 15
        while _alive(worker) and time.monotonic() < deadline:
            time.sleep(0.05)
        assert not _alive(worker)
    finally:
        parent.kill()
        parent.wait()
        parent.stdout.close()
