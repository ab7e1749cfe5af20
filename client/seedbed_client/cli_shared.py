"""What the client's command modules share (cli.py and the commands it registers from other
modules): exit codes, the usage error, and a Client built from the common options. Kept apart
so those modules import it instead of importing cli.py back."""

from __future__ import annotations

import argparse

from seedbed_client.client import Client, Timeouts
from seedbed_client.retry import RetryPolicy

EXIT_OK = 0
EXIT_MISMATCH = 1
EXIT_USAGE = 2
EXIT_SERVICE = 3
EXIT_UNREACHABLE = 4


class UsageProblem(Exception):  # noqa: N818 - internal, mirrors SpecInvalid
    """Bad input found by the command line itself (exit code 2)."""


def client_from_args(args: argparse.Namespace, *, cache: bool) -> Client:
    timeout = Timeouts() if args.timeout is None else Timeouts(args.timeout, args.timeout)
    return Client(
        args.server,
        timeout=timeout,
        retry=RetryPolicy(attempts=args.attempts),
        cache=cache,
        cache_dir=getattr(args, "cache_dir", None),
    )
