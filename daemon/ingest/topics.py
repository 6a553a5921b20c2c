"""Topic templates: which topics a stream takes, and which labels they carry.

A template is segments, each a literal or a ``{label}``:
``lat.{service}.{region}`` takes ``lat.checkout.eu`` and labels it
``service="checkout", region="eu"``. Literal segments must match exactly and
the segment count must agree, so ``lat.{service}`` never takes
``lat.checkout.eu``.

Segments are separated by dots (ZeroMQ topics) or by slashes (MQTT topic
levels: ``greenhouse/{bed}/climate`` takes ``greenhouse/bed-3/climate``). The
separator is ``/`` when the template contains a ``/`` and no ``.``, else ``.``;
a stream may also name it (``separator = "/"``) when an MQTT level holds a dot.
Every template valid before slashes were separators keeps its meaning: a
dot-free template with a slash was one literal segment, which matches exactly
the topics that its literal levels match now.

Matching is on the hot path (once per message), so a template is compiled to
one anchored regular expression at parse time; ``match`` is a single C-level
``fullmatch`` plus a printable check. Callers that see the same topics over and
over should still keep a bounded cache of results per topic string.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

#: Prometheus label names: ``[a-zA-Z_][a-zA-Z0-9_]*`` (Prometheus data model).
LABEL_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
#: Longest label value a topic segment may carry (ours: keeps series keys small).
MAX_LABEL_VALUE = 128
#: Segment separators: dots for ZeroMQ topics, slashes for MQTT topic levels.
SEPARATORS = (".", "/")


def _literal(sep: str) -> re.Pattern:
    """A literal segment: anything but the separator, braces and control characters."""
    return re.compile(rf"[^{re.escape(sep)}{{}}\x00-\x1f\x7f]+")


def _value(sep: str) -> str:
    """A label value: one segment of at most MAX_LABEL_VALUE characters, no control characters."""
    return rf"([^{re.escape(sep)}\x00-\x1f\x7f]{{1,{MAX_LABEL_VALUE}}})"


def default_separator(text: str) -> str:
    """``/`` for a template with a slash and no dot (an MQTT topic), else ``.``.

    >>> default_separator("greenhouse/{bed}/climate"), default_separator("lat.{service}")
    ('/', '.')
    """
    return "/" if "/" in text and "." not in text else "."


class TopicError(ValueError):
    """A topic template is malformed.

    Attributes
    ----------
    key : str
        Where the template came from (a config key path such as ``stream[0].topic``).
    value : str
        The template text.
    """

    def __init__(self, key: str, value: str, message: str) -> None:
        super().__init__(f"{key} = {value!r}: {message}")
        self.key = key
        self.value = value
        self.message = message


@dataclass(frozen=True, slots=True)
class TopicTemplate:
    """A compiled topic template.

    Use :meth:`parse` to build one.

    Attributes
    ----------
    text : str
        The template as written.
    segments : tuple of (str, bool)
        Each segment's text and whether it is a label (True) or a literal.
    labels : tuple of str
        Label names in order of appearance.
    prefix : str
        The literal text before the first label (with its trailing separator),
        or the whole template when it has no labels: the narrowest SUB filter
        that still lets every matching topic through.
    separator : str
        ``.`` or ``/``.

    Examples
    --------
    >>> t = TopicTemplate.parse("lat.{service}.{region}")
    >>> t.labels, t.prefix
    (('service', 'region'), 'lat.')
    >>> t.match("lat.checkout.eu")
    ('checkout', 'eu')
    >>> t.match("lat.checkout") is None
    True
    """

    text: str
    segments: tuple[tuple[str, bool], ...]
    labels: tuple[str, ...]
    prefix: str
    _pattern: re.Pattern = field(repr=False, compare=False)
    separator: str = "."

    @classmethod
    def parse(cls, text: str, key: str = "topic", separator: str | None = None) -> TopicTemplate:
        """Parse and compile a template. O(len(text)).

        Parameters
        ----------
        text : str
            Dot-separated segments; a segment is a literal or ``{label}`` where
            label is a Prometheus label name.
        key : str
            Where the text came from, for error messages.
        separator : str, optional
            ``.`` or ``/``; by default :func:`default_separator` of the text.

        Returns
        -------
        TopicTemplate

        Raises
        ------
        TopicError
            On an empty template or segment, a malformed ``{label}``, a literal
            with braces or control characters, or a label named twice.
        """
        if not isinstance(text, str):
            raise TopicError(key, text, "must be a string")
        if not text:
            raise TopicError(key, text, "must not be empty")
        sep = default_separator(text) if separator is None else separator
        if sep not in SEPARATORS:
            raise TopicError(key, text, f"cannot use the separator {sep!r} (only . or /)")
        literal, value = _literal(sep), _value(sep)
        segments: list[tuple[str, bool]] = []
        labels: list[str] = []
        parts: list[str] = []
        for i, seg in enumerate(text.split(sep)):
            if not seg:
                raise TopicError(key, text, f"has an empty segment {i + 1} "
                                 f"(a stray {'dot' if sep == '.' else 'slash'}?)")
            if seg.startswith("{") and seg.endswith("}"):
                name = seg[1:-1]
                if not LABEL_NAME.fullmatch(name):
                    raise TopicError(key, text, f"has the label {seg}, which is not a valid "
                                     "label name (letters, digits and _, not starting "
                                     "with a digit)")
                if name in labels:
                    raise TopicError(key, text, f"names the label {{{name}}} twice")
                labels.append(name)
                segments.append((name, True))
                parts.append(value)
            elif literal.fullmatch(seg):
                segments.append((seg, False))
                parts.append(re.escape(seg))
            else:
                raise TopicError(key, text, f"has the segment {seg!r}, which is neither a literal "
                                 "(no braces or control characters) nor a whole {label}")
        prefix_parts: list[str] = []
        for seg, is_label in segments:
            if is_label:
                prefix_parts.append("")
                break
            prefix_parts.append(seg)
        return cls(text, tuple(segments), tuple(labels), sep.join(prefix_parts),
                   re.compile(re.escape(sep).join(parts)), sep)

    def match(self, topic: str) -> tuple[str, ...] | None:
        """Label values of ``topic`` in order, or None if the template does not take it.

        A topic is refused when a literal segment differs, the segment count
        differs, a label value is empty, longer than ``MAX_LABEL_VALUE`` or not
        printable. O(len(topic)).

        Parameters
        ----------
        topic : str

        Returns
        -------
        tuple of str or None
            Empty tuple for a matching template without labels.
        """
        m = self._pattern.fullmatch(topic)
        if m is None or not topic.isprintable():
            return None
        return m.groups()

    def overlaps(self, other: TopicTemplate) -> bool:
        """Whether some topic could match both templates. O(segments).

        Two templates of one separator overlap when they have the same number
        of segments and no position holds two different literals. Templates of
        different separators are told apart only by their literal prefixes (a
        label may hold the other's separator): they overlap unless neither
        prefix starts the other.
        """
        if self.separator != other.separator:
            a, b = self.prefix, other.prefix
            return a.startswith(b) or b.startswith(a)
        if len(self.segments) != len(other.segments):
            return False
        return all(a_label or b_label or a == b for (a, a_label), (b, b_label)
                   in zip(self.segments, other.segments, strict=True))

    def __str__(self) -> str:
        return self.text


def series_text(stream: str, names: tuple[str, ...] | None, values: tuple[str, ...]) -> str:
    """How a series is named in every log line: ``stream{label=value,...}``, as the
    status page names its cards (values only when the names are no longer known,
    e.g. a checkpoint's stream that is no longer configured).

    Examples
    --------
    >>> series_text("lat", ("service", "region"), ("checkout", "eu"))
    'lat{service=checkout,region=eu}'
    >>> series_text("lat", None, ("checkout",)), series_text("q", (), ())
    ('lat{checkout}', 'q')
    """
    if not values:
        return stream
    shown = list(values)
    if names is not None:
        shown = [f"{n}={v}" for n, v in zip(names, shown, strict=True)]
    return f"{stream}{{{','.join(shown)}}}"
