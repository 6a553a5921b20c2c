"""Topic templates. Expected behaviour is the contract in DESIGN.md ("Wire format v1":
dot-separated segments, SUB filters on the prefix; "Configuration": literal segments
must match, {label} segments become labels); label-name syntax is the Prometheus data
model's [a-zA-Z_][a-zA-Z0-9_]*."""

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sigmad.daemon.ingest.topics import MAX_LABEL_VALUE, TopicError, TopicTemplate


def test_labels_and_prefix_of_a_two_label_template():
    t = TopicTemplate.parse("lat.{service}.{region}")
    assert t.labels == ("service", "region")
    assert t.prefix == "lat."
    assert t.text == str(t) == "lat.{service}.{region}"
    assert t.segments == (("lat", False), ("service", True), ("region", True))


@pytest.mark.parametrize(("text", "prefix"), [
    ("{series}", ""),                 # catch-all: subscribe to everything
    ("px.pair", "px.pair"),           # no labels: the whole topic
    ("a.b.{c}.d", "a.b."),            # literals after the first label cannot narrow a prefix
])
def test_prefix_is_the_literal_text_before_the_first_label(text, prefix):
    assert TopicTemplate.parse(text).prefix == prefix


def test_match_returns_label_values_in_order():
    t = TopicTemplate.parse("lat.{service}.{region}")
    assert t.match("lat.checkout.eu") == ("checkout", "eu")


def test_a_template_without_labels_matches_its_own_text_only():
    t = TopicTemplate.parse("px.pair")
    assert t.match("px.pair") == ()
    assert t.match("px.pairs") is None
    assert t.match("px") is None


@pytest.mark.parametrize("topic", [
    "lat.checkout",             # too few segments
    "lat.checkout.eu.extra",    # too many
    "rtt.checkout.eu",          # literal differs
    "LAT.checkout.eu",          # literals are case-sensitive
    "lat..eu",                  # empty label value
    "lat.checkout.",            # empty trailing value
    "",
])
def test_refused_topics(topic):
    assert TopicTemplate.parse("lat.{service}.{region}").match(topic) is None


def test_label_values_at_the_length_limit_match_and_beyond_it_do_not():
    t = TopicTemplate.parse("x.{v}")
    assert t.match("x." + "a" * MAX_LABEL_VALUE) == ("a" * MAX_LABEL_VALUE,)
    assert t.match("x." + "a" * (MAX_LABEL_VALUE + 1)) is None


@pytest.mark.parametrize("value", ["a\x00b", "tab\there", "bell\x07", "del\x7f", "line\u2028sep",
                                   "nbsp\x85"])
def test_label_values_with_control_or_unprintable_characters_are_refused(value):
    assert TopicTemplate.parse("x.{v}").match("x." + value) is None


def test_printable_unicode_label_values_match():
    assert TopicTemplate.parse("env.{site}").match("env.café-münchen 2") == ("café-münchen 2",)


@pytest.mark.parametrize(("text", "words"), [
    ("", "must not be empty"),
    ("lat..{x}", "has an empty segment 2"),
    ("lat.", "has an empty segment 2"),
    (".lat", "has an empty segment 1"),
    ("lat.{1st}", "not a valid label name"),
    ("lat.{a-b}", "not a valid label name"),
    ("lat.{}", "not a valid label name"),
    ("lat.a{b}", "neither a literal"),
    ("lat.{a}.{a}", "names the label {a} twice"),
    ("lat.\x01", "neither a literal (no braces or control characters)"),
])
def test_malformed_templates_raise_naming_key_and_text(text, words):
    with pytest.raises(TopicError) as info:
        TopicTemplate.parse(text, "stream[3].topic")
    message = str(info.value)
    assert words in message
    assert "stream[3].topic" in message and repr(text) in message
    assert info.value.key == "stream[3].topic" and info.value.value == text


def test_a_non_string_template_is_refused():
    with pytest.raises(TopicError, match="must be a string"):
        TopicTemplate.parse(42, "stream[0].topic")  # type: ignore[arg-type]


@pytest.mark.parametrize(("a", "b", "overlap"), [
    ("lat.{service}", "lat.{svc}", True),         # same shape, different label names
    ("lat.{service}", "lat.checkout", True),      # lat.checkout matches both
    ("lat.{service}", "rtt.{service}", False),    # literal clash
    ("lat.{service}", "lat.{service}.{region}", False),  # segment counts differ
    ("{series}", "px.pair", False),
    ("{a}.x", "y.{b}", True),                     # y.x matches both
    ("px.pair", "px.pair", True),
])
def test_overlap_means_some_topic_matches_both(a, b, overlap):
    ta, tb = TopicTemplate.parse(a), TopicTemplate.parse(b)
    assert ta.overlaps(tb) is overlap
    assert tb.overlaps(ta) is overlap


_value = st.text(st.characters(blacklist_categories=("Cc", "Cs", "Zl", "Zp", "Cf", "Co", "Cn"),
                               blacklist_characters="."), min_size=1, max_size=MAX_LABEL_VALUE)


@settings(max_examples=100, deadline=None)
@given(st.lists(_value, min_size=1, max_size=4))
def test_match_recovers_any_printable_label_values(values):
    template = TopicTemplate.parse("t." + ".".join(f"{{l{i}}}" for i in range(len(values))))
    topic = "t." + ".".join(values)
    # str.isprintable is the documented rule; the generated characters satisfy it by
    # construction except for a few separators Python counts as unprintable (e.g. Zs other
    # than the ASCII space), which must then be refused.
    expected = tuple(values) if topic.isprintable() else None
    assert template.match(topic) == expected
