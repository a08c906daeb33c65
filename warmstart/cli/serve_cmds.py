"""``warmstart serve``: one process owns the archive and serves it to the team."""

from __future__ import annotations

import ipaddress
import signal
import sys

import click

from warmstart.cli.common import fail, wait_seconds
from warmstart.cli.main import main

LOOPBACK_NAMES = ("localhost",)


def _is_loopback(host: str) -> bool:
    if host in LOOPBACK_NAMES:
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


@main.command()
@click.option("--host", default="127.0.0.1", show_default=True,
              help="Address to listen on. Anything but a loopback address needs --token-file.")
@click.option("--port", default=8750, show_default=True, type=click.IntRange(0, 65535), help="Port to listen on.")
@click.option("--token-file", type=click.Path(dir_okay=False), metavar="FILE",
              help='TOML file with one table per person: [dana] token = "..." role = "read"|"write"|"admin".')
@click.option("--lease-seconds", default=3600.0, show_default=True, type=click.FloatRange(min=1),
              help="Life of a proposal (lease) when the request asks for none.")
@click.option("--search-process/--no-search-process", default=None,
              help="Run the studies' searches in a child process, so proposals compute on a second core while "
                   "this process serves HTTP and writes the archive (one Python process uses about one core). "
                   "Default: on when the machine gives this process 2 or more cores.")
@click.option("--search-processes", default=2, show_default=True, type=click.IntRange(1, 64), metavar="N",
              help="With --search-process: child processes the studies are spread over (by study id), so "
                   "proposals of different studies are drawn at once.")
@click.pass_context
def serve(ctx, host, port, token_file, lease_seconds, search_process, search_processes):
    """Serve the archive to the team over HTTP: one process owns the file.

    Training jobs propose and record through it (leases keep parallel workers
    apart; retried writes with a request id count once), teammates query it,
    and a read-only page at / shows studies, curves, neighbors and the latest
    gain report. The API's description is at /api/v1/openapi.json. Stop it
    with Ctrl-C or SIGTERM: queued writes finish and the archive is closed.
    """
    try:
        import uvicorn

        from warmstart.service import Tokens, create_app
    except ImportError as exc:
        fail(f"warmstart serve needs the service extra ({exc.name} is missing); "
             "install it with: pip install 'warmstart[service]'")
    if not token_file and not _is_loopback(host):
        fail(f"--host {host} is not a loopback address: anyone who reaches it could write to the archive; "
             "give --token-file FILE (or serve on 127.0.0.1)")
    tokens = Tokens.load(token_file) if token_file else None
    from warmstart.archive.turns import open_archive

    archive = open_archive(ctx.find_root().obj["archive_path"], wait=wait_seconds(ctx))
    if search_process is None:
        search_process = usable_cores() >= 2
    children = search_processes if search_process else 0
    app = create_app(archive, tokens=tokens, lease_seconds=lease_seconds, search_process=children)
    listener = _log_to_stderr()
    config = uvicorn.Config(app, host=host, port=port, log_level="warning", access_log=False, lifespan="on",
                            timeout_graceful_shutdown=30)
    server = _make_server(config)
    who = f"tokens for {', '.join(tokens.names())}" if tokens else "no tokens (loopback only)"
    where = ("searches in this process" if not children else "searches in a child process" if children == 1
             else f"searches in {children} child processes")
    click.echo(f"serving {archive.path} on http://{host}:{port} ({who}; {where}); page at /, "
               "API description at /api/v1/openapi.json; Ctrl-C stops", err=True)
    try:
        server.run()
    finally:
        listener.stop()  # the lines still queued are written
    if server.stopped_by:
        click.echo(f"stopped on {server.stopped_by}; queued writes finished, archive closed", err=True)
    if not server.started:
        ctx.exit(1)


def usable_cores() -> int:
    """Cores this process may run on (its CPU affinity where the system tells it)."""
    import os

    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def _log_to_stderr():
    """The service's log (one line per request) to stderr, written by a thread of its
    own: the event loop only queues each line, the write itself (a system call per
    line) happens off it. Returns the started listener; stop it to flush."""
    import logging
    import logging.handlers
    import queue

    stream = logging.StreamHandler(sys.stderr)
    stream.setFormatter(logging.Formatter("%(asctime)s %(message)s", "%Y-%m-%dT%H:%M:%S"))
    lines: queue.SimpleQueue = queue.SimpleQueue()
    service_log = logging.getLogger("warmstart.service")
    service_log.handlers[:] = [logging.handlers.QueueHandler(lines)]
    service_log.setLevel(logging.INFO)
    service_log.propagate = False
    listener = logging.handlers.QueueListener(lines, stream)
    listener.start()
    return listener


def _make_server(config):
    """uvicorn's server, stopping on SIGINT/SIGTERM without re-raising the
    signal afterwards, so the command ends with exit code 0 after a clean stop."""
    import uvicorn

    class Server(uvicorn.Server):
        stopped_by: str | None = None

        def handle_exit(self, sig, frame):
            self.stopped_by = signal.Signals(sig).name
            if self.should_exit and sig == signal.SIGINT:
                self.force_exit = True  # a second Ctrl-C: stop without waiting
            else:
                self.should_exit = True

    return Server(config)
