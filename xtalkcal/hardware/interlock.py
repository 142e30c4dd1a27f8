"""The lab's interlock: a command that must approve every batch before it is sent.

A lab can name, in the chip file's ``[interlock]`` table, a program of its own that
reads whatever it trusts (the mixing-chamber temperature, a fridge controller's state,
a "nobody is working on the wiring" flag) and answers with its exit status::

    [interlock]
    command = ["/opt/lab/bin/fridge-ok", "--max-mxc-mk", "30"]   # argv, no shell
    timeout_s = 20.0                                            # default 30 s

Before every batch goes to the rig (after the drive-power check, and never for a batch
answered from a ``--record``), :class:`~xtalkcal.measure.BatchRunner` runs the command
with the environment variables ``XTALKCAL_CHIP`` and ``XTALKCAL_BATCH`` set. Exit status 0
approves the batch. Anything else refuses it: another status, no answer within
``timeout_s``, or a command that cannot be started. A refusal is an
:class:`~xtalkcal.exceptions.InterlockRefused` naming the batch and the command's first
line of output; nothing of that batch is sent, and a run with ``--record`` resumes from
there once the interlock approves again.
"""

from __future__ import annotations

import os
import subprocess
from dataclasses import dataclass
from typing import Any

from xtalkcal.common import Fields, valid
from xtalkcal.exceptions import InterlockRefused

__all__ = ["Interlock", "interlock_from_table"]

TIMEOUT_RANGE_S = (0.1, 600.0)


@dataclass(frozen=True)
class Interlock:
    """A command that approves each batch (see the module docstring).

    Parameters
    ----------
    command : tuple of str
        Program and arguments, run without a shell.
    timeout_s : float
        Seconds the command may take before its silence counts as a refusal.
    source : str
        The file that configured it, for messages.
    """

    command: tuple[str, ...]
    timeout_s: float = 30.0
    source: str = "<memory>"

    def approve(self, *, chip: str, batch: str) -> None:
        """Run the command for one batch; return if it approves, else raise.

        Raises
        ------
        InterlockRefused
            The command exited non-zero, timed out or could not be started.
        """
        env = {**os.environ, "XTALKCAL_CHIP": chip, "XTALKCAL_BATCH": batch}
        where = f"batch {batch}: not sent: the interlock of {self.source} ({self.command[0]})"
        try:
            done = subprocess.run(list(self.command), env=env, capture_output=True, text=True,
                                  timeout=self.timeout_s, check=False, stdin=subprocess.DEVNULL)
        except subprocess.TimeoutExpired:
            raise InterlockRefused(f"{where} gave no answer within {self.timeout_s:g} s; "
                                   "counted as a refusal") from None
        except OSError as exc:
            raise InterlockRefused(f"{where} could not be started: {exc}") from None
        if done.returncode != 0:
            said = (done.stdout.strip() or done.stderr.strip()).splitlines()
            reason = f": {said[0][:200]}" if said else ""
            raise InterlockRefused(f"{where} refused (exit status {done.returncode}){reason}")

    def to_dict(self) -> dict[str, Any]:
        """The ``[interlock]`` table of a chip file."""
        return {"command": list(self.command), "timeout_s": self.timeout_s}


def interlock_from_table(fields: Fields, present: bool) -> Interlock | None:
    """Read a chip file's ``[interlock]`` table (``None`` if the file has none).

    Problems are reported on ``fields``, naming the file and the field.
    """
    if not present:
        return None
    command = fields.argv("command")
    timeout = fields.number("timeout_s", 30.0, lo=TIMEOUT_RANGE_S[0], hi=TIMEOUT_RANGE_S[1],
                            unit="s")
    fields.reject_unknown()
    if not valid(command, timeout):
        return None
    return Interlock(tuple(command), float(timeout), fields.source)
