"""The daemon's view of the one lot model (``monitor.lotmodel``): when lots open, close and reopen.

Kept so ``monitor.daemon.accumulate`` and its tests import the policy from the daemon package; the model
itself, shared with ``lotwarden check``, lives in ``monitor.lotmodel``.
"""

from __future__ import annotations

from monitor.lotmodel import (
                              END_MARKER,
                              END_OF_INPUT,
                              IDLE,
                              NEXT_LOT,
                              Closure,
                              LotPlan,
                              Marker,
                              Segment,
                              Step,
                              close_at_end,
                              find_runs,
                              idle_lots,
                              markers_of,
                              openings,
                              plan_file,
                              runs_of_codes,
)

__all__ = ["END_MARKER", "END_OF_INPUT", "IDLE", "NEXT_LOT", "Closure", "LotPlan", "Marker", "Segment", "Step",
           "close_at_end", "find_runs", "idle_lots", "markers_of", "openings", "plan_file", "runs_of_codes"]
