"""The bar record's plain-map form, against the standard library's dataclass view."""

from __future__ import annotations

import dataclasses

from barsmith.bars.bar import BAR_COLUMNS, Bar


def test_as_dict_is_the_dataclass_in_column_order() -> None:
    bar = Bar(
        "FENWORTH.KMX", "time:1m", 60, 120, 1.5, 2.0, 1.25, 1.75, 10.0, 16.0, 1.6, 4, 9, 1,
        1.7, 1.8, 0.1, 0.12, 0.1, 0.15, True,
    )  # fmt: skip
    # dataclasses.asdict is the reference: same keys, same order, same values.
    assert bar.as_dict() == dataclasses.asdict(bar)
    assert list(bar.as_dict()) == list(BAR_COLUMNS) == [f.name for f in dataclasses.fields(Bar)]
