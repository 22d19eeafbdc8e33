"""Every line of the book rules (README, "Book rules")."""

from __future__ import annotations

from factories import T0, snap, tick

from barsmith.book.book import BookStatus, Outcome, SymbolBook
from barsmith.ingest.ticks import decode_tick


def apply(book: SymbolBook, rec: dict[str, object]) -> Outcome:
    t = decode_tick(rec)
    outcome = book.admit(t)
    if outcome is not Outcome.DUPLICATE:
        book.apply(t, outcome)
    return outcome


def live_book() -> SymbolBook:
    book = SymbolBook("FENWORTH~KESMOOR")
    apply(book, snap(seq=10, bid_px=10.0, bid_qty=5.0, ask_px=10.5, ask_qty=7.0))
    return book


def test_delta_before_first_snapshot_is_accepted_but_resyncing() -> None:
    book = SymbolBook("FENWORTH~KESMOOR")
    assert apply(book, tick(seq=41, bid_px=10.0)) is Outcome.ACCEPTED
    assert book.status is BookStatus.RESYNCING
    assert book.last_seq == 41
    assert book.bid_px is None  # quotes are not applied while resyncing
    assert book.spread() is None


def test_snapshot_sets_all_sides_and_goes_live() -> None:
    book = live_book()
    assert book.status is BookStatus.LIVE
    assert (book.bid_px, book.bid_qty, book.ask_px, book.ask_qty) == (10.0, 5.0, 10.5, 7.0)
    assert book.spread() == 0.5
    assert book.last_seq == 10


def test_snapshot_absent_side_means_empty() -> None:
    book = live_book()
    apply(book, snap(seq=11, bid_px=10.0, bid_qty=5.0))
    assert book.ask_px is None and book.ask_qty is None
    assert book.spread() is None


def test_snapshot_always_applied_even_with_lower_seq() -> None:
    book = live_book()
    assert apply(book, snap(seq=3, bid_px=9.0, ask_px=9.5)) is Outcome.ACCEPTED
    assert book.last_seq == 3 and book.bid_px == 9.0
    # After the reset, seq 4 is in sequence again.
    assert apply(book, tick(seq=4, ask_px=9.75)) is Outcome.ACCEPTED
    assert book.ask_px == 9.75


def test_duplicate_and_stale_are_dropped_entirely() -> None:
    book = live_book()
    assert apply(book, tick(seq=10, bid_px=1.0)) is Outcome.DUPLICATE
    assert apply(book, tick(seq=7, bid_px=1.0)) is Outcome.DUPLICATE
    assert book.bid_px == 10.0 and book.last_seq == 10


def test_in_sequence_delta_overwrites_present_fields_only() -> None:
    book = live_book()
    assert apply(book, tick(seq=11, bid_qty=9.0)) is Outcome.ACCEPTED
    assert (book.bid_px, book.bid_qty, book.ask_px, book.ask_qty) == (10.0, 9.0, 10.5, 7.0)


def test_nil_clears_a_side() -> None:
    book = live_book()
    apply(book, tick(seq=11, ask_px=None, ask_qty=None))
    assert book.ask_px is None and book.ask_qty is None
    assert book.status is BookStatus.LIVE
    assert book.spread() is None  # undefined with one side empty


def test_gap_is_accepted_counted_and_resyncs_until_next_snapshot() -> None:
    book = live_book()
    assert apply(book, tick(seq=13, bid_px=11.0)) is Outcome.GAP
    assert book.status is BookStatus.RESYNCING and book.last_seq == 13
    assert book.spread() is None
    assert apply(book, tick(seq=14, bid_px=12.0)) is Outcome.ACCEPTED
    assert book.bid_px == 10.0  # not applied while resyncing
    apply(book, snap(seq=15, bid_px=12.0, ask_px=12.5))
    assert book.status is BookStatus.LIVE and book.spread() == 0.5


def test_event_time_never_goes_backwards() -> None:
    book = live_book()
    first = decode_tick(tick(seq=11, ts=T0 + 500))
    book.admit(first)
    late = decode_tick(tick(seq=12, ts=T0 + 100))
    book.admit(late)
    assert late.ts == T0 + 500
    assert book.time_regressions == 1


def test_snapshot_trade_fields_are_state_not_a_trade() -> None:
    # Checked at the engine level too (no volume); here: the book ignores them.
    book = SymbolBook("FENWORTH~KESMOOR")
    apply(book, snap(seq=1, bid_px=1.0, ask_px=2.0, trade_px=1.5, trade_qty=10.0))
    assert book.status is BookStatus.LIVE
