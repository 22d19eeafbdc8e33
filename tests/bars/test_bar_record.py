"""The bar record's plain-map form, against the column table it derives from."""

from __future__ import annotations

from barsmith.bars.bar import BAR_COLUMNS, Bar
from barsmith.bars.spec import DEFAULT_COLUMNS, parse_specs


def test_as_dict_is_the_column_table_in_column_order() -> None:
    values = (
        "FENWORTH~KESMOOR", "time:1m", 60, 120, 1.5, 2.0, 1.25, 1.75, 10.0, 16.0, 1.6, 4, 9, 1,
        1.7, 1.8, 0.1, 0.12, 0.1, 0.15, True,
    )  # fmt: skip
    bar = Bar(BAR_COLUMNS, values)
    # The column table is the reference: same keys, same order, same values.
    assert bar.as_dict() == dict(zip((c.name for c in DEFAULT_COLUMNS), values, strict=True))
    assert list(bar.as_dict()) == list(BAR_COLUMNS) == [c.name for c in parse_specs(["time:1m"])[0].columns]
    assert (bar.close, bar.spread_max, bar.complete) == (1.75, 0.15, True)
