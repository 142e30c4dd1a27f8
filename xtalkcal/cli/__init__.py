"""The ``xtalkcal`` command line: a thin shell over the library, one module per command group.

* :mod:`~xtalkcal.cli.files` — ``check``, ``export-chip``
* :mod:`~xtalkcal.cli.calibrating` — ``calibrate`` (and the ledger/record helpers)
* :mod:`~xtalkcal.cli.compensating` — ``settings``, ``verify``
* :mod:`~xtalkcal.cli.ledger_views` — ``report``, ``history``
* :mod:`~xtalkcal.cli.due` — ``due``
* :mod:`~xtalkcal.cli.whole_job` — ``run``, ``demo``
* :mod:`~xtalkcal.cli.rigs` — which rig (simulator, device file, plug-in, lab chip file, dry
  run); :mod:`~xtalkcal.cli.shared` — exit codes, errors, option groups
* :mod:`~xtalkcal.cli.main` — the parser and :func:`main`

This package is the last stage of the flow and the only one that imports
:mod:`simulated_device` (the default rig).
"""

from xtalkcal.cli.calibrating import measurement_key as _measurement_key
from xtalkcal.cli.calibrating import record_in_ledger as _record_in_ledger
from xtalkcal.cli.main import build_parser, main

__all__ = ["build_parser", "main", "_measurement_key", "_record_in_ledger"]
