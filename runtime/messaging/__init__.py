"""rigcast.runtime.messaging: the wire: messages, their encoding, sockets and the one client.

Modules: wire, protocol, protocol_client, messages, nesting, sockets, client, timecode.
"""
