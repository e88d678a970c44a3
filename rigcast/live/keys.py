"""``rigcast keys``: make a CurveZMQ key pair (CurveZMQ, RFC 26) for a server or a client.

A stage setup in a few commands (README, "On a stage network")::

    rigcast keys keys/ --name server          # keys/server.key, keys/server.key_secret
    rigcast keys keys/clients --name capture  # one pair per client machine or program
    rigcast serve --bundle face.rcb --input tcp://0.0.0.0:5570 --output tcp://0.0.0.0:5571 \\
        --allow-remote --curve-secret-key keys/server.key_secret --authorized-keys keys/clients
    rigcast send take.npz --to tcp://stage-pc:5570 --from tcp://stage-pc:5571 \\
        --server-key keys/server.key --client-key keys/clients/capture.key_secret
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from rigcast.errors import EXIT_OK, UserError
from rigcast.runtime.trust.keys import KeyFileError, create_key_pair


def keys_from_args(args: argparse.Namespace) -> int:
    try:
        public, secret = create_key_pair(Path(args.folder), args.name)
    except KeyFileError as exc:
        raise UserError(str(exc), "choose another --name or folder") from None
    sys.stdout.write(
        f"public key: {public}  (copy it: to the server's --authorized-keys folder for a client, "
        "to every client's --server-key for a server)\n"
        f"secret key: {secret}  (keep it on this machine; readable by you only)\n")
    return EXIT_OK
