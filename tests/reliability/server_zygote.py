"""Start Morrow's server many times quickly: import once, fork a server process per start.

    python -m tests.reliability.server_zygote DATABASE_URL PORT

Each line "start" on standard input forks a child that builds the app (``create_app``:
migrations checked, CSRF key read) and runs uvicorn on 127.0.0.1:PORT, as `morrow serve`
does with one worker; the child's process id is written to standard output. The test kills
children with SIGKILL. Importing the app's scientific stack takes seconds on a busy 2-core
machine, and a crash test with twenty restarts would spend most of its time there; the
fork skips that and nothing else. Children are reaped by the kernel (SIGCHLD ignored), so a
killed child's id disappears at once. End of input ends this process.

Nothing that opens a connection or a thread may run here before the fork: the import of
the app module only defines things, and BLAS is held to one thread by the caller's
environment (OPENBLAS_NUM_THREADS=1), so the child starts from a clean single thread.
"""

from __future__ import annotations

import os
import signal
import sys


def main(url: str, port: int) -> None:
    import uvicorn

    from app.store import db
    from app.web.app import create_app

    db.head_revision()  # Alembic's modules and scripts loaded once; no connection is opened
    signal.signal(signal.SIGCHLD, signal.SIG_IGN)
    for line in sys.stdin:
        if line.strip() != "start":
            continue
        pid = os.fork()
        if pid == 0:
            signal.signal(signal.SIGCHLD, signal.SIG_DFL)
            os.close(0)
            try:
                uvicorn.run(create_app(url), host="127.0.0.1", port=port, log_level="warning")
            finally:
                os._exit(0)
        print(pid, flush=True)


if __name__ == "__main__":
    main(sys.argv[1], int(sys.argv[2]))
