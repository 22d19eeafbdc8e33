"""Time bars against pandas, a general-purpose reference library.

pandas ``Series.resample("1min")`` uses half-open intervals [start, end) labelled by
their start (``closed="left", label="left"`` are the defaults for minute rules --
pandas documentation, "Resampling"), the same convention as barsmith's time bars.
"""

from __future__ import annotations

import random

import pandas as pd
import pytest
from factories import T0, run_engine, trade


def random_trades(seed: int, n: int) -> list[dict[str, object]]:
    rng = random.Random(seed)
    recs = []
    ts = T0
    seqs: dict[str, int] = {}
    for _ in range(n):
        ts += rng.randint(0, 9_000_000_000)
        sym = rng.choice(["FENWORTH~KESMOOR", "MARROWAY~KESMOOR", "QUILLFERN~KESMOOR"])
        seqs[sym] = seqs.get(sym, 0) + 1
        recs.append(trade(sym, ts, seqs[sym], round(rng.uniform(90, 110), 2), float(rng.randint(1, 50))))
    return recs


@pytest.mark.parametrize("rule", ["1min", "5min", "500ms", "1h"])
def test_time_bars_match_pandas_resample(rule: str) -> None:
    recs = random_trades(seed=3, n=3000)
    spec = {"1min": "time:1m", "5min": "time:5m", "500ms": "time:500ms", "1h": "time:1h"}[rule]
    bars, _ = run_engine(recs, specs=(spec,))
    ours = pd.DataFrame([b.as_dict() for b in bars]).set_index(["symbol", "start"]).sort_index()

    frame = pd.DataFrame(recs)
    frame["time"] = pd.to_datetime(frame["ts"], unit="ns", utc=True)
    frame["notional"] = frame["trade_px"] * frame["trade_qty"]
    for sym, group in frame.groupby("sym"):
        resampled = group.set_index("time")
        ohlc = resampled["trade_px"].resample(rule).ohlc()
        volume = resampled["trade_qty"].resample(rule).sum()
        notional = resampled["notional"].resample(rule).sum()
        count = resampled["trade_px"].resample(rule).count()
        ref = ohlc.assign(volume=volume, notional=notional, trades=count)
        ref = ref[ref["trades"] > 0]  # pandas also emits empty intervals; barsmith does not
        mine = ours.loc[sym]
        assert list(mine.index) == [stamp.value for stamp in ref.index]
        for column in ("open", "high", "low", "close", "volume", "notional", "trades"):
            assert mine[column].to_numpy() == pytest.approx(ref[column].to_numpy(dtype=float), rel=1e-12), column
        vwap = ref["notional"] / ref["volume"]
        assert mine["vwap"].to_numpy() == pytest.approx(vwap.to_numpy(), rel=1e-12)
