"""100,000 fuzzed messages, each outcome predicted from the README's rules (see
tests/fuzz_oracle.py): rejections by reason and series against numpy."""

import logging

import pytest
from fuzz_oracle import run

pytestmark = pytest.mark.slow   # a 100,000-message fuzz loop


def test_100000_fuzzed_messages_end_as_the_readme_predicts():
    logging.disable(logging.WARNING)
    try:
        figures = run(100_000, seed=3)
    finally:
        logging.disable(logging.NOTSET)
    assert figures["series"] == 12
    assert set(figures["rejected"]) == {
        "too_large", "not_msgpack", "not_a_map", "no_values", "missing_field", "bad_value",
        "length_mismatch", "too_many_rows", "bad_source", "bad_seq", "no_stream",
        "bad_topic", "future_time", "clock_skew", "not_finite", "bad_weight"}
