"""The Prefect API a flow talks to: a long-lived server (``PREFECT_API_URL``) or a temporary one
started here, patiently, before any work begins.

Prefect starts a temporary ("ephemeral") API server in a subprocess when ``PREFECT_API_URL`` is
unset, and gives it ``PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS`` (Prefect's default: 20 s)
to answer.  On a busy machine the start-up took 50–65 s (2 cores, six CPU-bound processes beside
it), so a morning run died with a timeout.  Here the start-up waits at least
:data:`DEFAULT_STARTUP_S` seconds (unless that variable is set in the environment), is tried
twice, and a final failure is one line naming both fixes.
"""

from __future__ import annotations

import logging
import os
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

from tallywave.pipeline.errors import RunFailed, UserError

STARTUP_ENV = "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS"
#: Seconds a temporary server is given to start when the environment does not say (Prefect: 20).
DEFAULT_STARTUP_S = 180
#: Attempts at starting a temporary server before giving up.
STARTUP_ATTEMPTS = 2
#: Seconds a long-lived server (PREFECT_API_URL) is given to answer its health check.
HEALTH_WAIT_S = 60.0

_FIX = ("run `prefect server start` once and set PREFECT_API_URL=http://127.0.0.1:4200/api "
        "(no start-up per run)")


class OrchestrationUnavailable(RunFailed):
    """The Prefect API could not be reached or started; nothing ran."""

    exit_code = 5


def startup_timeout() -> int:
    """Seconds to wait for a temporary server: the environment variable if set, else at least
    :data:`DEFAULT_STARTUP_S`."""
    text = os.environ.get(STARTUP_ENV, "").strip()
    if text:
        try:
            value = int(float(text))
        except ValueError:
            raise UserError(f"{STARTUP_ENV}='{text}' is not a number of seconds") from None
        return max(1, value)
    from prefect.settings import PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS

    return max(DEFAULT_STARTUP_S, int(PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS.value()))


def api_url() -> str:
    """The configured Prefect API URL ('' when Prefect would start a temporary server)."""
    from prefect.settings import PREFECT_API_URL

    return str(PREFECT_API_URL.value() or "")


def ensure_api(log_file: Path | None = None, *, attempts: int = STARTUP_ATTEMPTS) -> str:
    """Make sure a Prefect API answers before a flow starts; return its URL.

    With ``PREFECT_API_URL`` set, wait up to :data:`HEALTH_WAIT_S` for it to answer.  Otherwise
    start the temporary server now (its output to ``log_file`` when given), with a generous
    time-out and a retry, so the flow finds it running.  Failure: :class:`OrchestrationUnavailable`.
    """
    url = api_url()
    if url:
        _check_health(url)
        return url
    timeout = startup_timeout()
    server = _server(log_file)
    log = logging.getLogger("tallywave")
    for attempt in range(1, attempts + 1):
        try:
            server.start(timeout=timeout)
            return str(server.api_url)
        except Exception as exc:  # noqa: BLE001 - Prefect raises RuntimeError / httpx errors
            text = str(exc).split(" stdout:")[0]
            log.warning(f"temporary Prefect server, attempt {attempt}/{attempts}: {text}")
            _reset(server)
            if attempt < attempts:
                time.sleep(2.0)
    times = "twice" if attempts == 2 else f"{attempts} times"
    raise OrchestrationUnavailable(
        f"the temporary Prefect server did not start within {timeout} s, {times} (machine "
        f"busy?): raise {STARTUP_ENV}, or {_FIX}")


def _check_health(url: str) -> None:
    from prefect.client.orchestration import get_client

    deadline = time.monotonic() + HEALTH_WAIT_S
    while True:
        with get_client(sync_client=True) as client:
            err = client.api_healthcheck()
        if err is None:
            return
        if time.monotonic() > deadline:
            first = str(err).strip().splitlines()[0][:120] if str(err).strip() else ""
            raise OrchestrationUnavailable(
                f"the Prefect server at PREFECT_API_URL={url} does not answer "
                f"({type(err).__name__}: {first}): start it with `prefect server start`, or "
                "unset PREFECT_API_URL to let tallywave start a temporary one")
        time.sleep(2.0)


def _server(log_file: Path | None) -> Any:
    """Prefect's temporary-server object, writing its output to ``log_file`` when given.

    Prefect keeps one instance per port and finds this one (port None) when the flow asks for
    a client, so the flow uses the server started here instead of starting its own.
    """
    from prefect.server.api.server import SubprocessASGIServer

    if log_file is None or not hasattr(SubprocessASGIServer, "_run_uvicorn_command"):
        return SubprocessASGIServer()
    existing = getattr(SubprocessASGIServer, "_instances", {}).get(None)
    if existing is not None:
        return existing

    target = log_file

    class _LoggedServer(SubprocessASGIServer):
        """The same server with its console output appended to the run's log file."""

        def _run_uvicorn_command(self) -> subprocess.Popen[Any]:
            # The child inherits descriptors 1 and 2 at spawn: point them at the log file for
            # that instant (Prefect's own command line and environment stay untouched).
            sys.stdout.flush()
            sys.stderr.flush()
            saved = os.dup(1), os.dup(2)
            fd = os.open(target, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
            try:
                os.dup2(fd, 1)
                os.dup2(fd, 2)
                return super()._run_uvicorn_command()
            finally:
                os.dup2(saved[0], 1)
                os.dup2(saved[1], 2)
                for d in (fd, *saved):
                    os.close(d)

    return _LoggedServer()


def _reset(server: Any) -> None:
    """Stop a server that did not answer in time, so a retry starts a fresh one."""
    try:
        server.stop()
    except Exception:  # noqa: BLE001, S110 - best effort: the process may already be gone
        pass
    server.server_process = None
    server.running = False
    server.port = None
