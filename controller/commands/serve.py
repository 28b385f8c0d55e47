"""`ratefit serve` — run the sizing API (FastAPI under uvicorn) over a model store.

Thin: checks the arguments, reads the token file, sets up JSON-lines logging and
hands ``ratefit.models.api.create_app`` to uvicorn. uvicorn handles SIGTERM/SIGINT
itself with a graceful shutdown (stop accepting, finish requests in flight, run the
lifespan's exit), after which the command returns 0.
"""

from __future__ import annotations

import argparse
import errno
import ipaddress
import os
import socket
import stat
from pathlib import Path

from ratefit.models.errors import InputError

DEFAULT_HOST = "127.0.0.1"
DEFAULT_PORT = 8470

HELP = """\
Serve the demand curves of a model store over HTTP (the sizing API the reconcile
loop asks). Loads every artifact of --store at start; refuses corrupt ones and
serves the rest. POST /v1/reload re-reads the store without a restart.

Routes: GET /v1/models, GET /v1/models/NS/WORKLOAD/CONTAINER[/demand?rate=R],
POST /v1/demand (batch), POST /v1/reload, /healthz, /readyz, /metrics, /docs.
Binds 127.0.0.1 unless --host says otherwise. With --token-file every route but
/healthz needs 'Authorization: Bearer <token>'. --metrics-port adds a second listener
that serves only /metrics and /healthz (no token; the labels name routes and reasons,
never a model), so Prometheus can scrape an API that binds loopback.

Limits (each refusal is logged and counted in ratefit_api_connections_refused_total):
a request head (request line and headers) over 64 KiB or with more than 100 header
fields gets 431 and the connection is closed; a request that has not fully arrived
--request-timeout after the connection opened or the request began is closed (408 if
its head is incomplete); an idle keep-alive connection is closed after --idle-timeout;
connections above --max-connections are closed at once. Store files: only regular
files inside --store are read (no symbolic links, FIFOs or devices), at most 16 MiB each.
"""


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "serve",
        help="serve the model store over the HTTP sizing API",
        description=HELP,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--store", required=True, metavar="DIR", help="model store directory (what ratefit train writes)")
    p.add_argument(
        "--host",
        default=DEFAULT_HOST,
        help=f"address to bind (default {DEFAULT_HOST}, loopback only; use 0.0.0.0 in a Pod, with --token-file)",
    )
    p.add_argument("--port", type=int, default=DEFAULT_PORT, help=f"TCP port (default {DEFAULT_PORT})")
    p.add_argument(
        "--fd",
        type=int,
        default=None,
        metavar="N",
        help="serve on an already bound, listening TCP socket inherited as file descriptor N "
        "(socket activation, test harnesses); --host and --port are then ignored",
    )
    p.add_argument(
        "--token-file",
        metavar="FILE",
        help="file holding a bearer token; when given, every route but /healthz requires it",
    )
    p.add_argument(
        "--max-batch",
        type=int,
        default=None,
        metavar="N",
        help="most items accepted in one POST /v1/demand (default 50000)",
    )
    p.add_argument(
        "--reload-interval",
        metavar="DURATION",
        default=None,
        help="also re-read the store every DURATION (e.g. 30s, 5m); only changed files are "
        "verified again. Default: only on POST /v1/reload",
    )
    p.add_argument(
        "--max-connections",
        type=int,
        default=256,
        metavar="N",
        help="most open connections; more are closed at once (default 256)",
    )
    p.add_argument(
        "--request-timeout",
        metavar="DURATION",
        default="10s",
        help="time a request may take to arrive, head and body (default 10s)",
    )
    p.add_argument(
        "--idle-timeout",
        metavar="DURATION",
        default="5s",
        help="close a keep-alive connection idle this long between requests (default 5s)",
    )
    p.add_argument(
        "--metrics-port",
        type=int,
        default=None,
        metavar="PORT",
        help="also serve /metrics (and /healthz) alone on this port, for Prometheus "
        "(0: any free port; default: off, /metrics only on the API's own port)",
    )
    p.add_argument(
        "--metrics-host",
        default=DEFAULT_HOST,
        help=f"address of that metrics listener (default {DEFAULT_HOST}; 0.0.0.0 in a Pod)",
    )
    p.add_argument(
        "--log-level",
        default="info",
        choices=["debug", "info", "warning", "error"],
        help="log level of the JSON-lines log on stderr (info includes the access log)",
    )
    p.set_defaults(handler=_run)


def read_token(path: str) -> str:
    """The token in ``path`` (surrounding whitespace stripped); InputError if unusable."""
    try:
        text = Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"--token-file {path!r}: cannot read it ({exc})") from exc
    token = text.strip()
    if not token or any(c.isspace() for c in token) or not token.isprintable():
        raise InputError(
            f"--token-file {path!r}: must hold one token of printable characters without spaces "
            "(e.g. the output of `openssl rand -hex 32`)"
        )
    return token


def exposure_warning(bound: str, token: str | None, *, fd: int | None = None) -> str | None:
    """The warning for serving beyond loopback without a token (``--host`` or ``--fd``
    alike), or None."""
    if token is not None:
        return None
    if bound == "localhost":
        return None
    try:
        if ipaddress.ip_address(bound).is_loopback:
            return None
    except ValueError:
        pass  # a host name: may resolve to anything
    how = f"--fd {fd} (bound to {bound})" if fd is not None else bound
    return f"binding {how} without --token-file: anyone who can reach the port can read the models"


def _inherited_socket(fd: int) -> socket.socket:
    try:
        sock = socket.socket(fileno=fd)  # family and type detected from the descriptor
    except OSError as exc:
        raise InputError(f"--fd {fd}: not an open socket ({exc})") from exc
    if sock.type != socket.SOCK_STREAM or sock.family not in (socket.AF_INET, socket.AF_INET6):
        raise InputError(f"--fd {fd}: must be a listening TCP socket (got {sock.family!r}, {sock.type!r})")
    return sock


def bind_socket(host: str, port: int) -> socket.socket:
    """A TCP socket bound to ``host:port`` before the server starts, so a taken port is
    one line naming it (not a server log that starts and stops)."""
    try:
        family, kind, proto, _, addr = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)[0]
    except socket.gaierror as exc:
        raise InputError(f"--host {host}: cannot resolve it ({exc.strerror or exc})") from exc
    sock = socket.socket(family, kind, proto)
    try:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        sock.bind(addr)
    except OSError as exc:
        sock.close()
        what = "is already in use" if exc.errno == errno.EADDRINUSE else f"cannot be bound ({exc.strerror or exc})"
        raise InputError(f"--port {port} on {host} {what}: stop the other server or pick another --port "
                         "(0: any free port)") from exc
    return sock


def _run(args: argparse.Namespace) -> int:
    from ratefit.controller.commands.store_dir import existing_store

    store = existing_store(args.store)
    if not 0 <= args.port <= 65535:
        raise InputError(f"--port {args.port}: must be between 0 and 65535")
    if args.metrics_port is not None and not 0 <= args.metrics_port <= 65535:
        raise InputError(f"--metrics-port {args.metrics_port}: must be between 0 and 65535")
    token = read_token(args.token_file) if args.token_file else None

    import logging

    import uvicorn

    from ratefit.models.api import ApiSettings, create_app
    from ratefit.models.api_logging import configure_json_logging

    configure_json_logging(args.log_level)
    log = logging.getLogger("ratefit.api")
    if args.token_file:
        mode = os.stat(args.token_file).st_mode
        if mode & (stat.S_IRGRP | stat.S_IROTH):
            log.warning("token file %s is readable by other users: chmod 600 it", args.token_file)
    from ratefit.models.durations import parse_duration

    if args.max_connections < 1:
        raise InputError(f"--max-connections {args.max_connections}: must be at least 1")
    request_timeout = parse_duration(args.request_timeout, field="--request-timeout")
    idle_timeout = parse_duration(args.idle_timeout, field="--idle-timeout")
    sockets = [_inherited_socket(args.fd) if args.fd is not None else bind_socket(args.host, args.port)]
    bound = args.host if args.fd is None else str(sockets[0].getsockname()[0])
    warning = exposure_warning(bound, token, fd=args.fd)
    if warning:
        log.warning("%s", warning)
    settings_kw: dict[str, object] = {"store": store, "token": token}
    if args.max_batch is not None:
        settings_kw["max_batch"] = args.max_batch
    if args.reload_interval is not None:
        settings_kw["reload_interval"] = parse_duration(args.reload_interval, field="--reload-interval")
    try:
        settings = ApiSettings(**settings_kw)  # type: ignore[arg-type]
    except ValueError as exc:
        raise InputError(f"invalid option: {exc}") from exc
    app = create_app(settings)
    from ratefit.models.api_limits import ConnectionLimits, limited_protocol

    metrics = app.state.metrics
    protocol = limited_protocol(
        ConnectionLimits(request_timeout=request_timeout, max_connections=args.max_connections),
        on_refused=lambda reason: metrics.connections_refused.labels(reason).inc(),
    )
    config = uvicorn.Config(
        app,
        host=args.host,
        port=args.port,
        http=protocol,
        log_config=None,  # keep our JSON-lines handlers
        log_level=args.log_level,
        access_log=False,  # the app writes its own structured access log
        lifespan="on",
        timeout_graceful_shutdown=10,
        timeout_keep_alive=idle_timeout,  # type: ignore[arg-type]  # call_later takes a float
        backlog=min(2048, max(16, args.max_connections)),
        server_header=False,
    )
    server = uvicorn.Server(config)
    listener = None
    if args.metrics_port is not None:
        from prometheus_client.exposition import generate_latest

        from ratefit.controller.metrics_listener import MetricsListener

        try:
            listener = MetricsListener(lambda: generate_latest(metrics.registry), host=args.metrics_host,
                                       port=args.metrics_port).start()
        except OSError as exc:
            for sock in sockets:
                sock.close()
            raise InputError(f"--metrics-port {args.metrics_port} on {args.metrics_host} cannot be bound "
                             f"({exc.strerror or exc}): pick another port") from exc
        log.info("metrics on %s/metrics", listener.url)
    try:
        server.run(sockets=sockets)
    finally:
        if listener is not None:
            listener.stop()
    if not server.started:
        raise InputError(f"could not start the server on {args.host}:{args.port} (see the log above: port in use?)")
    return 0
