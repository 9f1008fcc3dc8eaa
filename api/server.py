"""Ways to run the service: a uvicorn server with refit worker processes, a standalone refit
worker, and an embedded server in background threads (for ``honing demo`` and tests)."""

from __future__ import annotations

import logging
import multiprocessing
import os
import signal
import socket
import threading
import time
from collections.abc import Callable
from pathlib import Path
from types import FrameType

import uvicorn
from threadpoolctl import threadpool_limits

from honing.api.app import create_app
from honing.api.logs import configure_logging
from honing.api.refitter import Refitter
from honing.api.settings import Settings
from honing.api.store import open_store

__all__ = ["run_refitter", "run_server", "start_background_server"]

log = logging.getLogger("honing.api.server")

#: Seconds to wait for an embedded server to start listening.
START_TIMEOUT = 30.0


#: How often a refit worker started by `run_server` checks that the server still runs.
PARENT_POLL_SECONDS = 1.0
#: Variables by which an operator chooses the numerical libraries' thread count.
THREAD_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


def one_blas_thread_unless_set() -> None:
    """Limit this process's BLAS and OpenMP pools to one thread, unless the environment sets
    their size.

    Refit processes are the unit of parallelism (``--refit-workers``, more refitters), and
    they share the machine with the API. A BLAS pool as wide as the machine in each of them
    oversubscribes the cores: on 2 shared cores a 500 x 500 symmetric eigendecomposition
    took 65-705 ms with two threads and 35 ms with one, and a whole refit on 3 x 5000
    outputs 1.3-2.4 s against 0.7-1.2 s.
    """
    if not any(name in os.environ for name in THREAD_VARIABLES):
        threadpool_limits(1)


def run_refitter(store_url: str, log_level: str = "info", parent_pid: int | None = None) -> None:
    """Run refit jobs of the store until SIGTERM or SIGINT (a standalone worker process).

    With `parent_pid` (a worker of `run_server`), also stop once that process is gone, so a
    server killed outright leaves no refit worker behind.
    """
    configure_logging(log_level)
    one_blas_thread_unless_set()
    stop = threading.Event()

    def on_signal(signum: int, frame: FrameType | None) -> None:
        stop.set()

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    if parent_pid is not None:
        threading.Thread(
            target=_stop_when_orphaned, args=(parent_pid, stop), name="parent-watch", daemon=True
        ).start()
    store = open_store(store_url)
    log.info("refit worker started", extra={"store": store.kind})
    try:
        Refitter(store).run_forever(stop)
    finally:
        store.close()


def _stop_when_orphaned(parent_pid: int, stop: threading.Event) -> None:
    """Set `stop` once this process's parent is no longer `parent_pid`."""
    while not stop.wait(PARENT_POLL_SECONDS):
        if os.getppid() != parent_pid:
            log.warning("the serving process is gone; refit worker stopping")
            stop.set()


def run_server(
    host: str,
    port: int,
    store_url: str,
    admin_key_file: str | Path | None = None,
    refit_workers: int = 1,
) -> None:
    """Serve the API with uvicorn in this process and ``refit_workers`` refit processes."""
    settings = Settings(
        store_url=store_url,
        admin_key_file=Path(admin_key_file) if admin_key_file else None,
        refit_workers=refit_workers,
    )
    configure_logging(settings.log_level)
    app = create_app(settings)
    context = multiprocessing.get_context("spawn")
    workers = [
        context.Process(
            target=run_refitter,
            args=(store_url, settings.log_level, os.getpid()),
            name=f"honing-refitter-{i}",
        )
        for i in range(refit_workers)
    ]
    for worker in workers:
        worker.start()
    if not workers:
        # Without one, calibrations wait in "fitting" for good, and nothing else says why.
        log.warning(
            "no refit workers in this process: results are fitted only while a 'honing "
            "refitter --store %s' (or another server) runs on the same store",
            store_url,
        )
    try:
        uvicorn.run(app, host=host, port=port, log_config=None, access_log=False)
    finally:
        for worker in workers:
            worker.terminate()
        for worker in workers:
            worker.join(timeout=30)
            if worker.is_alive():
                worker.kill()


def start_background_server(
    store_url: str, host: str = "127.0.0.1", port: int = 0
) -> tuple[str, Callable[[], None]]:
    """Start the API and one refit worker in threads of this process.

    Returns the base URL (the port is chosen when ``port`` is 0) and a function that stops
    both and closes the store.
    """
    settings = Settings(store_url=store_url)
    app = create_app(settings)
    sock = socket.socket(socket.AF_INET6 if ":" in host else socket.AF_INET)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.bind((host, port))
    bound = sock.getsockname()[1]
    server = uvicorn.Server(uvicorn.Config(app, log_config=None, access_log=False, lifespan="on"))
    serving = threading.Thread(
        target=server.run, kwargs={"sockets": [sock]}, name="honing-api", daemon=True
    )
    serving.start()
    deadline = time.monotonic() + START_TIMEOUT
    while not server.started:
        if not serving.is_alive() or time.monotonic() > deadline:
            sock.close()
            raise RuntimeError(f"the embedded server did not start on {host}:{bound}")
        time.sleep(0.01)
    refit_store = open_store(store_url)
    refitter = Refitter(refit_store, app.state.metrics)
    stop_refits = threading.Event()
    refitting = threading.Thread(
        target=refitter.run_forever,
        args=(stop_refits,),
        kwargs={"poll": 0.2},
        name="honing-refitter",
        daemon=True,
    )
    refitting.start()

    def stop() -> None:
        server.should_exit = True
        serving.join(timeout=30)
        stop_refits.set()
        refitting.join(timeout=60)
        refit_store.close()
        sock.close()

    netloc = f"[{host}]" if ":" in host else host
    return f"http://{netloc}:{bound}", stop
