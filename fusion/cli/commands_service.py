"""``magfuse serve`` and ``magfuse token``: the HTTP service and its access tokens."""

from __future__ import annotations

from typing import Annotated

import typer

from fusion.cli.common import ConfigOption, StoreOption, load, open_store, print_advisory

__all__ = ["register"]

token_app = typer.Typer(
    help="Access tokens of the service: add (printed once), revoke, list.",
    no_args_is_help=True,
    rich_markup_mode=None,
)


def register(app: typer.Typer) -> None:
    """Mount ``serve`` and the ``token`` group."""
    app.command("serve")(serve_command)
    app.add_typer(token_app, name="token")


def serve_command(
    host: Annotated[
        str | None,
        typer.Option("--host", help="Address to bind (default: [service] host, 127.0.0.1)."),
    ] = None,
    port: Annotated[
        int | None, typer.Option("--port", help="TCP port (default: [service] port).")
    ] = None,
    workers: Annotated[int, typer.Option("--workers", min=1, max=64, help="Worker processes.")] = 1,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Serve the store over HTTP: JSON API (/v1), FDSN event query, analyst pages.

    Binds to the loopback address unless told otherwise; logs one line per request; stops
    cleanly on SIGTERM. A model adopted by the API, the command line or the nightly run is used
    from the next request on.
    """
    from fusion.service.server import serve

    cfg = load(config)
    st = open_store(cfg, store, create=False)
    print_advisory()  # once at start: the server runs until it is stopped
    serve(
        st.root,
        config,
        host=host or cfg.service.host,
        port=port if port is not None else cfg.service.port,
        workers=workers,
    )


@token_app.command("add")
def token_add(
    name: Annotated[str, typer.Argument(help="Name of the token (who or what uses it).")],
    scope: Annotated[
        str, typer.Option("--scope", help="read, submit (includes read) or admin (includes all).")
    ] = "read",
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Create a token and print it once; only its salted hash is stored."""
    from fusion.service.tokens import TokenBook

    cfg = load(config)
    st = open_store(cfg, store, create=False)
    token = TokenBook(st.root, lock=st.write_lock).add(name, scope)
    typer.echo(token)
    typer.echo(
        f"token {name!r} (scope {scope}) created; it is shown only now: keep it safe", err=True
    )
    print_advisory()


@token_app.command("revoke")
def token_revoke(
    name: Annotated[str, typer.Argument(help="Name of the token.")],
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Revoke a token: requests with it are refused from now on."""
    from fusion.service.tokens import TokenBook

    cfg = load(config)
    st = open_store(cfg, store, create=False)
    TokenBook(st.root, lock=st.write_lock).revoke(name)
    typer.echo(f"token {name!r} revoked")


@token_app.command("list")
def token_list(store: StoreOption = None, config: ConfigOption = None) -> None:
    """List tokens: name, scope and creation time (never the tokens)."""
    from fusion.service.tokens import TokenBook

    cfg = load(config)
    st = open_store(cfg, store, create=False)
    for t in TokenBook(st.root).list():
        typer.echo(f"{t.name:<24} {t.scope:<7} {t.created}")
