"""``contentlab serve``: the workspace as a local web app and JSON API."""

from __future__ import annotations

import argparse

from . import add_workspace_option, command_parser, whole_number

LOOPBACK = {"127.0.0.1", "localhost", "::1"}


def register(subparsers) -> None:
    p = command_parser(
        subparsers,
        "serve",
        help="open the workspace in the browser: score drafts as you type, run tests, read the report",
        description=(
            "Start a local web app on the workspace (pages for drafts, experiments, history and drivers, the "
            "weekly report and imports) and a JSON API under /api/. The model is loaded once and reloaded when "
            "'contentlab learn' saves a newer one. It listens on 127.0.0.1 only, unless --host says otherwise; "
            "any other address needs an access token (printed at start, or --token). Stop it with Ctrl+C."
        ),
        example="contentlab serve --workspace demo-workspace   # then open http://127.0.0.1:8765/",
    )
    add_workspace_option(p)
    p.add_argument("--host", default="127.0.0.1",
                   help="address to listen on (default: %(default)s, this computer only)")
    p.add_argument("--port", type=whole_number, default=8765, help="port (default: %(default)s)")
    p.add_argument("--no-browser", action="store_true", help="do not open a browser window")
    p.add_argument("--token", metavar="T",
                   help="access token every page and API call must carry (generated when --host is not local)")
    p.set_defaults(handler=cmd_serve)


def cmd_serve(args: argparse.Namespace) -> int:
    from ..errors import ContentlabError
    from ..workspace import resolve_dir

    if not 0 < args.port < 65536:
        raise ContentlabError(f"--port must be between 1 and 65535; got {args.port}.")
    if args.token is not None and len(args.token) < 16:
        raise ContentlabError("--token must have at least 16 characters (or leave it out and one is generated).")
    check_address(args.host, args.port)  # before anything is printed: a taken port is one clear line, exit code 2
    import threading
    import webbrowser

    import uvicorn

    from ..web import create_app
    from ..web.security import new_token

    token = args.token
    if args.host not in LOOPBACK and not token:
        token = new_token()
    path = resolve_dir(args.workspace)
    app = create_app(path, token)
    try:  # load the model and score once before the first request, so the first one is quick too
        from ..web.services import prewarm

        prewarm(app.state.workspace)
    except ContentlabError as exc:
        print(f"note: {exc}")
    shown = f"[{args.host}]" if ":" in args.host else args.host
    address = f"http://{shown}:{args.port}/"
    link = f"{address}?token={token}" if token else address
    print(f"contentlab serve: workspace {path}")
    print(f"Open {link}  (Ctrl+C stops it)")
    if token:
        print(f"API calls send the header X-Contentlab-Token: {token}")
    if not args.no_browser:
        threading.Timer(1.0, webbrowser.open, args=(link,)).start()
    try:
        uvicorn.run(app, host=args.host, port=args.port, log_level="warning", access_log=False)
    except OSError as exc:  # e.g. the port is taken
        raise ContentlabError(f"cannot listen on {args.host}:{args.port} ({exc.strerror or exc}); "
                              "choose another --port.") from None
    return 0


def check_address(host: str, port: int) -> None:
    """Refuse a --host this computer cannot listen on, or a --port another program holds, in words that say what to do.

    The server itself would stop with its own log line and exit code 3; this checks first by binding once.
    """
    import errno
    import socket

    from ..errors import ContentlabError

    try:
        family, kind, proto, _, address = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)[0]
    except (socket.gaierror, UnicodeError) as exc:
        reason = exc.strerror if isinstance(exc, socket.gaierror) else str(exc)
        raise ContentlabError(f"--host {host}: not an address this computer can listen on ({reason}); use 127.0.0.1 "
                              "(this computer only) or 0.0.0.0 (every network it is on).") from None
    with socket.socket(family, kind, proto) as probe:
        probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)  # as the server does
        try:
            probe.bind(address)
        except OSError as exc:
            if exc.errno == errno.EADDRINUSE:
                raise ContentlabError(f"port {port} on {host} is in use by another program (perhaps another contentlab "
                                      f"serve); choose another with --port, e.g. --port {port + 1 if port < 65535 else 8765}."
                                      ) from None
            raise ContentlabError(f"cannot listen on {host}:{port} ({exc.strerror or exc}); choose another --host or "
                                  "--port.") from None
