"""Where a preparation runs: in this process (``local``) or on a Dask cluster (``dask``).

The dask engine's libraries are an optional extra (``pip install
'panelprep[dask]'``); nothing here imports them until a run asks for the
engine, so the base install never needs them.  What the dask engine cannot
do yet is refused before any data is read, one option per line
(:func:`refuse_unsupported`); the flow itself is ``panelprep.partitioned``.
"""

from __future__ import annotations

import logging
import os
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from panelprep.errors import InputError

DASK_INSTALL = "pip install 'panelprep[dask]'"
# the components methods whose moments are per-entity sums (the others need the rows again)
DASK_METHODS = ("swamy-arora", "nerlove")
DASK_TRANSFORMS = ("within", "between", "quasi")


def require_dask() -> None:
    """Refuse, with the one command that installs them, when dask or distributed is missing."""
    try:
        import dask.dataframe  # noqa: F401
        import distributed  # noqa: F401
    except ImportError as err:
        raise InputError(f"--engine dask needs the dask extra, which is not installed "
                         f"({err.name or 'dask'} is missing): {DASK_INSTALL}") from None


def refuse_unsupported(options: Any, read_options: Any) -> None:
    """One line naming the first option the dask engine does not support yet.

    ``options`` is a ``prepare.PrepareOptions``; ``read_options`` an
    ``io.ReadOptions``.  Each refusal names the option and its run-file key.
    """
    policies = options.policies
    other = ",".join(t for t in options.transforms if t not in DASK_TRANSFORMS)
    unsupported = [
        (policies.duplicates != "fail", f"--duplicates {policies.duplicates} (clean.duplicates)"),
        (policies.normalise_ids != "none",
         f"--normalise-ids {policies.normalise_ids} (clean.normalise_ids)"),
        (policies.singletons != "keep", f"--singletons {policies.singletons} (clean.singletons)"),
        (policies.balance != "keep", f"--balance {policies.balance} (clean.balance)"),
        (any(policies.window), "--window (clean.window)"),
        (bool(options.shifts), "--lag, --lead and --diff (derive.*)"),
        (options.contract is not None, "--contract (contract.schema)"),
        (options.previous is not None, "--previous (compare.previous)"),
        (options.method not in DASK_METHODS,
         f"--method {options.method} (output.method; it supports {', '.join(DASK_METHODS)})"),
        (bool(other), f"--transform {other} (output.transforms)"),
        (options.evidence, "the evidence tests: add --no-evidence (output.evidence = false)"),
        (options.output_format != "parquet", "--format csv (output.format)"),
        (read_options.input_format == "arrow", "--input-format arrow (input.format)"),
    ]
    for refused, what in unsupported:
        if refused:
            raise InputError(f"the dask engine does not support {what} yet; run it with "
                             "--engine local")


@contextmanager
def dask_client(address: str | None) -> Iterator[Any]:
    """A ``distributed.Client`` on the scheduler at ``address``, or on a local cluster.

    Without an address a ``LocalCluster`` is started with one single-threaded
    worker process per core (numpy releases the GIL, but pandas work on a
    partition does not) and closed at the end; its dashboard takes a free port.  Its logs go nowhere below
    errors, so stderr holds the run's own progress.
    """
    from distributed import Client, LocalCluster

    if address is not None:
        try:
            client = Client(address, timeout="20s")
        except (OSError, TimeoutError, ValueError) as err:
            raise InputError(f"--cluster {address}: cannot reach the scheduler "
                             f"({' '.join(str(err).split())[:120]})") from None
        with client:
            yield client
        return
    with LocalCluster(n_workers=os.cpu_count() or 1, threads_per_worker=1, processes=True,
                      dashboard_address=":0", silence_logs=logging.ERROR) as cluster, \
            Client(cluster) as client:
        yield client
