"""Stage 3: bar specs, bar families (where a bar starts and closes), statistic groups
(what a bar carries) and the column table.

Importing this package registers the built-in families (``time``, ``session``,
``trades``, ``volume``, ``notional``, and the imbalance families) and statistic groups (``core``, ``spread``,
``signed``, and the microstructure groups ``mid``, ``cost``, ``depth``, ``flow``, ``rv``).
"""

from barsmith.bars import core, imbalance, interval, micro, session, signed, spread, threshold

__all__ = ["core", "imbalance", "interval", "micro", "session", "signed", "spread", "threshold"]
