"""The Python client of the Apportion HTTP API: `ApportionClient` (one method per operation),
one job waiter with backoff and a progress callback, and one exception type for refused
requests (`ProblemError`). The command line and the demo are built on it; it imports nothing of
the server."""

from apportion.client.errors import (
    ClientError,
    JobFailed,
    JobTimeout,
    ProblemError,
    Unreachable,
)
from apportion.client.http import DEFAULT_URL, ENV_KEY, ENV_URL, ApportionClient
from apportion.client.tables import Rows, as_json
from apportion.client.waiter import Backoff, wait_for_job

__all__ = [
    "DEFAULT_URL",
    "ENV_KEY",
    "ENV_URL",
    "ApportionClient",
    "Backoff",
    "ClientError",
    "JobFailed",
    "JobTimeout",
    "ProblemError",
    "Rows",
    "Unreachable",
    "as_json",
    "wait_for_job",
]
