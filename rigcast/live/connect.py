"""How a command finds its server: CURVE keys from the arguments, the stream ids (named, or
learnt from the server's telemetry) and a stream's control schema, each failure one readable
line. Every command that talks to a server (send, watch, record, osc) uses these, through
``rigcast.runtime.messaging.client``, so no command imports another."""

from __future__ import annotations

import logging
from typing import Any

from rigcast.errors import NoAnswerError, UserError
from rigcast.runtime.messaging.client import MeshSender, ServerError, discover_streams
from rigcast.runtime.messaging.protocol import schema_from_reply
from rigcast.runtime.schema import ControlSchema, SchemaError
from rigcast.runtime.trust.keys import ClientCurve, client_curve

log = logging.getLogger(__name__)


def curve_from_args(args: Any) -> ClientCurve | None:
    """The CURVE keys given by --server-key and --client-key (both or neither), or None."""
    return client_curve(getattr(args, "server_key", None), getattr(args, "client_key", None))


def streams_or_discover(streams: list[str] | None, source: str, timeout_s: float,
                        curve: ClientCurve | None = None) -> list[str]:
    """The named streams, or every stream heard on ``source``; one readable error if none."""
    if streams:
        return list(dict.fromkeys(streams))
    try:
        return discover_streams(source, timeout_s=timeout_s, curve=curve)
    except TimeoutError as exc:
        raise NoAnswerError(str(exc), "start a server, or pass --stream and --from") from None


def stream_or_discover(stream: str | None, source: str, timeout_s: float,
                       curve: ClientCurve | None = None) -> str:
    """The named stream, or the first one heard on ``source``."""
    return streams_or_discover([stream] if stream else None, source, timeout_s, curve)[0]


def fetch_schema(endpoint: str, stream: str, timeout_s: float,
                 curve: ClientCurve | None = None) -> ControlSchema:
    """The stream's control schema from the server's input endpoint; NoAnswerError or
    UserError (a refused stream) otherwise."""
    return schema_from_reply(schema_reply(endpoint, stream, timeout_s, curve))


def schema_reply(endpoint: str, stream: str, timeout_s: float,
                 curve: ClientCurve | None = None,
                 sender: MeshSender | None = None) -> dict[str, Any]:
    """The stream's whole schema reply (vertices, bundle, controls)."""
    own = sender is None
    client = sender if sender is not None else MeshSender(endpoint, curve=curve)
    try:
        return client.request_schema(stream, timeout_s)
    except TimeoutError:
        raise NoAnswerError(f"no server answered at {endpoint} within {timeout_s:g} s") from None
    except ServerError as err:
        raise UserError(f"the server at {endpoint} refused stream {stream!r} ({err})",
                        "pass --stream with a stream the server serves") from None
    finally:
        if own:
            client.close()


def schema_or_none(endpoint: str | None, stream: str, timeout_s: float = 0.5,
                   curve: ClientCurve | None = None) -> ControlSchema | None:
    """The schema when ``endpoint`` is given and answers, else None (views then show control
    indices: a monitoring machine may have only the publish endpoint)."""
    if endpoint is None:
        return None
    try:
        return fetch_schema(endpoint, stream, timeout_s, curve)
    except (UserError, SchemaError) as exc:
        log.info("no schema for stream %s from %s (%s); controls shown by index", stream,
                 endpoint, exc)
        return None
