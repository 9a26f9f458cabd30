"""``benchctl serve``: the read-only lab web view of a store (:mod:`benchctl.web`)."""

from __future__ import annotations

import argparse

from rich.markup import escape

from benchctl.exit_codes import EXIT_OK
from benchctl.commands.console import console, error_console
from benchctl.errors import ConfigurationError


def cmd_serve(args: argparse.Namespace) -> int:
    try:
        from benchctl.web.app import create_app
        from benchctl.web.server import make_server
    except ImportError as exc:
        raise ConfigurationError(f"the web view needs the web extra ({exc.name} is not installed): "
                                 "pip install 'benchctl[web]'") from exc
    from benchctl.commands.stores import existing_store_url, print_store_notes
    from benchctl.locations import default_db
    from benchctl.store import Store
    from benchctl.web.access import check_bind, load_token, masked

    token = load_token(args.token_file)
    check_bind(args.host, token)  # refused before the store is opened or a socket bound
    store = Store.open(existing_store_url(args.db or default_db()), read_only=True)
    try:
        print_store_notes(store)
        app = create_app(store, token=token, limits=args.limits or ())
        server = make_server(app, args.host, args.port)
        host = f"[{args.host}]" if ":" in args.host else args.host
        url = f"http://{host}:{server.effective_port}/"
        console().print(f"lab view of {escape(store.url)} (read-only) at [bold]{escape(url)}[/]")
        if token:
            console().print(f"access token required ({escape(masked(token))}); open {escape(url)}?token=<token> once")
        console().print("Ctrl-C stops it")
        try:
            server.run()
        except KeyboardInterrupt:
            error_console().print("stopped")
        finally:
            server.close()
    finally:
        store.close()
    return EXIT_OK


__all__ = ["cmd_serve"]
