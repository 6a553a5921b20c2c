"""Configuration validation. Keys, defaults and value syntax are the contract in
DESIGN.md ("Configuration") and the daemon brief; TOML syntax is parsed by the standard
library's tomllib; duration arithmetic (1 m = 60 s, 1 h = 3600 s, 1 d = 86400 s) is
common practice."""

import glob
import re
import tomllib
from pathlib import Path

import pytest
from sigmad.daemon.config.describe import describe
from sigmad.daemon.config.errors import ConfigError
from sigmad.daemon.config.load import default_config, load_config, parse_config
from sigmad.daemon.config.schema import (
    RESERVED_LABELS,
    Config,
    DaemonConfig,
    MergeConfig,
    MixtureConfig,
    PublishConfig,
    RegressionConfig,
    SourceConfig,
    StreamConfig,
    schema_defaults,
    show_default,
)
from sigmad.daemon.config.units import parse_duration, parse_half_life
from sigmad.estimators import HalfLife

ROOT = Path(__file__).resolve().parent.parent
SOURCE = '[[source]]\nsocket = "pull"\nbind = "tcp://127.0.0.1:7410"\n'
STREAM = '[[stream]]\nname = "lat"\ntopic = "lat.{service}"\nfields = ["ms"]\n'


def minimal(stream_extra: str = "", head: str = "", tail: str = "") -> str:
    return head + "\n" + SOURCE + STREAM + stream_extra + "\n" + tail


def error(text: str) -> ConfigError:
    with pytest.raises(ConfigError) as info:
        parse_config(text, "site.toml")
    message = str(info.value)
    assert message.startswith("site.toml: ")
    assert "\n" not in message and message.endswith((".", "?"))  # one sentence
    return info.value


# ------------------------------------------------------------------ durations

@pytest.mark.parametrize(("text", "seconds"), [
    ("250ms", 0.25), ("30s", 30.0), ("1.5s", 1.5), ("5m", 300.0), ("2h", 7200.0),
    ("1d", 86400.0), (" 10 m ", 600.0), (".5s", 0.5), ("3.s", 3.0),
])
def test_durations(text, seconds):
    assert parse_duration(text, "k") == pytest.approx(seconds, rel=1e-15)


@pytest.mark.parametrize(("value", "words"), [
    ("10", "is not a duration"), ("10 minutes", "is not a duration"), ("5M", "is not a duration"),
    ("-5s", "is not a duration"), ("", "is not a duration"), ("0s", "longer than zero"),
    ("0ms", "longer than zero"), (30, 'write it with a unit, e.g. "30s"'),
    (True, "is not a duration string"), (None, "is not a duration string"),
])
def test_bad_durations_name_key_and_value(value, words):
    with pytest.raises(ConfigError) as info:
        parse_duration(value, "daemon.flush_every")
    assert str(info.value).startswith(f"daemon.flush_every = {value!r} ")
    assert words in str(info.value)


def test_half_lives_in_seconds_and_observations():
    assert parse_half_life("10m", "k") == HalfLife(600.0, "seconds")
    assert parse_half_life("5000 obs", "k") == HalfLife(5000.0, "observations")
    assert parse_half_life("12observations", "k") == HalfLife(12.0, "observations")


@pytest.mark.parametrize("value", ["0 obs", "5000 ops", "obs", "ten minutes", 600])
def test_bad_half_lives(value):
    with pytest.raises(ConfigError, match=r"^stream\[0\]\.half_life = "):
        parse_half_life(value, "stream[0].half_life")


# ------------------------------------------------------------------ every key

FULL = """
[daemon]
http = "[::1]:9999"
state_file = "s.state"
checkpoint_every = "1m"
tls_cert = "c.crt"
tls_key = "c.key"
tls_client_ca = "ca.crt"
max_message_bytes = 4096
max_batch_rows = 77
flush_every = "20ms"
max_clock_skew = "2h"
strict_restore = true
log_rejected = 0

[[source]]
socket = "sub"
connect = ["tcp://10.0.0.1:5000", "ipc:///tmp/x.ipc"]
topics = ["lat.", "px."]
curve_secret = "keys/server.key_secret"
curve_allow = "keys/producers"
high_water_mark = 5

[[source]]
socket = "pull"
bind = "inproc://in"

[[stream]]
name = "pair"
topic = "px.{pair}.{venue}"
fields = ["a", "b", "c"]
half_life = "100 obs"
correction = "frequency"
quantiles = [0.25, 0.75]
outlier_sigmas = [2, 4.5]
outlier_warmup = 3
mixture = { components = 3, log = true, covariance = "diag", warmup = 10, seed = 42 }
regression = { y = "b", x = "a", intercept = false }
max_series = 9
idle_expiry = "90s"

[publish]
bind = "tcp://127.0.0.1:7411"
every = "500ms"

[merge]
connect = ["tcp://127.0.0.1:7421"]
shard_expiry = "1m"
"""


def test_every_key_is_read():
    cfg = parse_config(FULL, "full.toml")
    assert cfg.origin == "full.toml"
    assert cfg.daemon == DaemonConfig(
        http="[::1]:9999", state_file="s.state", checkpoint_every=60.0, tls_cert="c.crt",
        tls_key="c.key", tls_client_ca="ca.crt", max_message_bytes=4096, max_batch_rows=77,
        flush_every=0.02, max_clock_skew=7200.0, strict_restore=True, log_rejected=0)
    assert (cfg.daemon.http_host, cfg.daemon.http_port) == ("::1", 9999)
    assert cfg.sources == (
        SourceConfig(socket="sub", connect=("tcp://10.0.0.1:5000", "ipc:///tmp/x.ipc"),
                     topics=("lat.", "px."), curve_secret="keys/server.key_secret",
                     curve_allow="keys/producers", high_water_mark=5),
        SourceConfig(socket="pull", bind=("inproc://in",)),
    )
    assert cfg.sources[1].endpoints == ("inproc://in",)
    (s,) = cfg.streams
    assert (s.name, s.topic.text, s.topic.labels, s.fields, s.dim) == (
        "pair", "px.{pair}.{venue}", ("pair", "venue"), ("a", "b", "c"), 3)
    assert s.half_life == HalfLife(100.0, "observations")
    assert (s.correction, s.quantiles, s.outlier_sigmas, s.outlier_warmup) == (
        "frequency", (0.25, 0.75), (2.0, 4.5), 3)
    assert s.mixture == MixtureConfig(components=3, log=True, covariance="diag", warmup=10,
                                      seed=42)
    assert s.regression == RegressionConfig(y="b", x=("a",), intercept=False)
    assert (s.max_series, s.idle_expiry) == (9, 90.0)
    assert cfg.publish == PublishConfig(bind=("tcp://127.0.0.1:7411",), every=0.5)
    assert cfg.merge == MergeConfig(connect=("tcp://127.0.0.1:7421",), shard_expiry=60.0)


def test_defaults_of_a_minimal_config():
    cfg = parse_config(minimal())
    assert cfg.daemon == DaemonConfig()
    assert DaemonConfig().http == "127.0.0.1:9410" and DaemonConfig().flush_every == 0.05
    (src,) = cfg.sources
    assert (src.topics, src.high_water_mark, src.curve_secret) == (("",), 10000, None)
    (s,) = cfg.streams
    assert s.half_life is None and s.correction == "reliability"
    assert s.quantiles == (0.5, 0.9, 0.99) and s.outlier_sigmas == ()
    assert (s.outlier_warmup, s.mixture, s.regression, s.max_series, s.idle_expiry) == (
        30, None, None, 1000, None)
    assert cfg.publish is None and cfg.merge is None


def test_configs_are_frozen():
    cfg = parse_config(minimal())
    with pytest.raises(AttributeError):
        cfg.streams[0].name = "other"  # type: ignore[misc]


def test_regression_x_as_list_and_mixture_defaults():
    cfg = parse_config(minimal().replace('fields = ["ms"]', 'fields = ["y", "u", "v"]')
                       + 'regression = { y = "y", x = ["u", "v"] }\nmixture = { components = 1 }')
    assert cfg.streams[0].regression == RegressionConfig("y", ("u", "v"), True)
    assert cfg.streams[0].mixture == MixtureConfig(1, False, "full", 200, 0)


def test_a_merger_needs_no_source():
    cfg = parse_config('[merge]\nconnect = "tcp://127.0.0.1:7411"\n'
                       '[[stream]]\nname = "a"\ntopic = "a"\nfields = ["v"]\n')
    assert cfg.sources == () and cfg.merge.connect == ("tcp://127.0.0.1:7411",)


def test_a_merger_needs_the_shards_streams():
    with pytest.raises(ConfigError) as e:
        parse_config('[merge]\nconnect = "tcp://127.0.0.1:7411"\n')
    assert e.value.key == "stream" and "shards' [[stream]]" in str(e.value)


def test_dataclasses_can_be_built_directly():
    assert Config().daemon == DaemonConfig() and Config().streams == ()


# ------------------------------------------------------------------ errors

ERRORS = [
    # (toml, key path, value as shown, words)
    (minimal(head="[daemon]\nhtpp = 'x:1'"), "daemon.htpp", "'x:1'", "did you mean 'http'?"),
    (minimal("halflife = '10m'"), "stream[0].halflife", "'10m'", "did you mean 'half_life'?"),
    (minimal("colour = 'red'"), "stream[0].colour", "'red'", "known keys: name, topic"),
    (minimal(tail="[[sources]]\nsocket='pull'"), "sources", "[{'socket': 'pull'}]",
     "did you mean 'source'?"),
    (minimal("mixture = { components = 2, logs = true }"), "stream[0].mixture.logs", "True",
     "did you mean 'log'?"),
    (minimal(head="[daemon]\nhttp = 'localhost'"), "daemon.http", "'localhost'", "host:port"),
    (minimal(head="[daemon]\nhttp = 'h:70000'"), "daemon.http", "'h:70000'", "0 to 65535"),
    (minimal(head="[daemon]\nhttp = '::1:80'"), "daemon.http", "'::1:80'", "in brackets"),
    (minimal(head="[daemon]\nhttp = '[zz]:80'"), "daemon.http", "'[zz]:80'", "invalid IPv6"),
    (minimal(head="[daemon]\nhttp = 9410"), "daemon.http", "9410", "must be a string"),
    (minimal(head="[daemon]\ncheckpoint_every = 30"), "daemon.checkpoint_every", "30",
     "with a unit"),
    (minimal(head="[daemon]\nflush_every = '50 ms per batch'"), "daemon.flush_every",
     "'50 ms per batch'", "is not a duration"),
    (minimal(head="[daemon]\nmax_message_bytes = 1.5"), "daemon.max_message_bytes", "1.5",
     "must be an integer"),
    (minimal(head="[daemon]\nmax_batch_rows = 0"), "daemon.max_batch_rows", "0", "from 1 to"),
    (minimal(head="[daemon]\nlog_rejected = -1"), "daemon.log_rejected", "-1", ">= 0"),
    (minimal(head="[daemon]\nstrict_restore = 'yes'"), "daemon.strict_restore", "'yes'",
     "true or false"),
    (minimal(head="[daemon]\nstate_file = ''"), "daemon.state_file", "''", "must not be empty"),
    (minimal(head="[daemon]\ntls_cert = 'c.crt'"), "daemon.tls_key", None, "tls_cert needs it"),
    (minimal(head="[daemon]\ntls_client_ca = 'ca.crt'"), "daemon.tls_client_ca", "'ca.crt'",
     "needs tls_cert"),
    ("[daemon]\n", "source", None, "add a [[source]]"),
    (SOURCE, "stream", None, "add a [[stream]]"),
    ('[source]\nsocket = "pull"\n' + STREAM, "source", "{'socket': 'pull'}",
     "must be written [[source]]"),
    (STREAM.replace("[[stream]]", "[[source]]\nsocket = 'push'\nbind = 'tcp://a:1'\n"
                    "[[stream]]"), "source[0].socket", "'push'", 'one of "pull" | "sub"'),
    ("[[source]]\nbind = 'tcp://a:1'\n" + STREAM, "source[0].socket", None, "required"),
    ("[[source]]\nsocket = 'pull'\n" + STREAM, "source[0].bind", None,
     "a source needs bind or connect"),
    ("[[source]]\nsocket = 'pull'\nbind = 'tcp://a:1'\nconnect = 'tcp://b:2'\n" + STREAM,
     "source[0].bind", "['tcp://a:1']", "cannot both be given"),
    ("[[source]]\nsocket = 'pull'\nbind = []\n" + STREAM, "source[0].bind", "[]",
     "at least one endpoint"),
    ("[[source]]\nsocket = 'pull'\nbind = 'udp://a:1'\n" + STREAM, "source[0].bind",
     "'udp://a:1'", "tcp://, ipc:// or inproc://"),
    ("[[source]]\nsocket = 'pull'\nbind = 'tcp://a'\n" + STREAM, "source[0].bind",
     "'tcp://a'", "host:port"),
    ("[[source]]\nsocket = 'pull'\nconnect = 'tcp://a:*'\n" + STREAM, "source[0].connect",
     "'tcp://a:*'", "host:port"),
    ("[[source]]\nsocket = 'pull'\nbind = ['tcp://a:1', 2]\n" + STREAM, "source[0].bind",
     "['tcp://a:1', 2]", "a string or a list of strings"),
    ("[[source]]\nsocket = 'pull'\nbind = 'tcp://a:1'\ntopics = ['x']\n" + STREAM,
     "source[0].topics", "['x']", "applies only to socket"),
    ("[[source]]\nsocket = 'sub'\nbind = 'tcp://a:1'\ntopics = []\n" + STREAM,
     "source[0].topics", "[]", "at least one prefix"),
    ("[[source]]\nsocket = 'pull'\nbind = 'tcp://a:1'\ncurve_allow = 'keys'\n" + STREAM,
     "source[0].curve_allow", "'keys'", "needs curve_secret"),
    ("[[source]]\nsocket = 'pull'\nbind = 'tcp://a:1'\nhigh_water_mark = 0\n" + STREAM,
     "source[0].high_water_mark", "0", ">= 1"),
    (SOURCE + SOURCE + STREAM, "source[1].bind", "'tcp://127.0.0.1:7410'",
     "already bound by source[0].bind"),
    (minimal(tail="[publish]\nbind = 'tcp://127.0.0.1:7410'"), "publish.bind",
     "'tcp://127.0.0.1:7410'", "already bound by source[0].bind"),
    (minimal(tail="[publish]\nevery = '1s'"), "publish.bind", None, "needs an endpoint"),
    (minimal(tail="[merge]\nshard_expiry = '1s'"), "merge.connect", None, "needs endpoints"),
    (minimal(tail="[merge]\nconnect = 'tcp://a:1'\nshard_expiry = 5"), "merge.shard_expiry",
     "5", "with a unit"),
    (SOURCE + "[[stream]]\ntopic = 'x'\nfields = ['v']\n", "stream[0].name", None, "required"),
    (minimal().replace('name = "lat"', 'name = "lat-ms"'), "stream[0].name", "'lat-ms'",
     "not a valid stream name"),
    (minimal(tail=STREAM.replace("lat.{service}", "rtt.{service}")), "stream[1].name", "'lat'",
     "already the name of stream[0]"),
    (minimal(tail=STREAM.replace('"lat"', '"lat2"').replace("{service}", "checkout")),
     "stream[1].topic", "'lat.checkout'", "same topics as stream[0]"),
    (minimal().replace("lat.{service}", "lat..x"), "stream[0].topic", "'lat..x'",
     "has an empty segment 2"),
    (minimal().replace("lat.{service}", "lat.{stream}"), "stream[0].topic", "'lat.{stream}'",
     "reserve"),
    (minimal().replace("lat.{service}", "lat.{__x}"), "stream[0].topic", "'lat.{__x}'",
     "reserve"),
    (minimal().replace("lat.{service}", "lat.{a}.{a}"), "stream[0].topic", "'lat.{a}.{a}'",
     "names the label {a} twice"),
    (minimal().replace('fields = ["ms"]', "fields = []"), "stream[0].fields", "[]",
     "at least one field"),
    (minimal().replace('fields = ["ms"]', 'fields = ["a", "a"]'), "stream[0].fields",
     "['a', 'a']", "names 'a' twice"),
    (minimal().replace('fields = ["ms"]', 'fields = ["1st"]'), "stream[0].fields", "'1st'",
     "not a valid field name"),
    (minimal().replace('fields = ["ms"]', "fields = 3"), "stream[0].fields", "3",
     "a string or a list"),
    (minimal("half_life = '10 minutes'"), "stream[0].half_life", "'10 minutes'",
     "is not a half-life"),
    (minimal("correction = 'bessel'"), "stream[0].correction", "'bessel'",
     '"none" | "frequency" | "reliability"'),
    (minimal("quantiles = [0.5, 1.0]"), "stream[0].quantiles", "1.0", "strictly between 0 and 1"),
    (minimal("quantiles = [0.0]"), "stream[0].quantiles", "0.0", "strictly between 0 and 1"),
    (minimal("quantiles = [0.5, 0.5]"), "stream[0].quantiles", "[0.5, 0.5]", "repeat"),
    (minimal("quantiles = ['p99']"), "stream[0].quantiles", "['p99']", "a list of numbers"),
    (minimal("quantiles = 0.5"), "stream[0].quantiles", "0.5", "a list of numbers"),
    (minimal("outlier_sigmas = [3, -1]"), "stream[0].outlier_sigmas", "-1.0", "> 0"),
    (minimal("outlier_sigmas = [inf]"), "stream[0].outlier_sigmas", "inf", "finite"),
    (minimal("outlier_sigmas = [true]"), "stream[0].outlier_sigmas", "[True]", "numbers"),
    (minimal("outlier_warmup = -3"), "stream[0].outlier_warmup", "-3", ">= 0"),
    (minimal("mixture = 2"), "stream[0].mixture", "2", "must be a table"),
    (minimal("mixture = { log = true }"), "stream[0].mixture.components", None, "required"),
    (minimal("mixture = { components = 0 }"), "stream[0].mixture.components", "0", "1 to 64"),
    (minimal("mixture = { components = 2, covariance = 'tied' }"),
     "stream[0].mixture.covariance", "'tied'", '"full" | "diag"'),
    (minimal("mixture = { components = 2, log = 1 }"), "stream[0].mixture.log", "1",
     "true or false"),
    (minimal("mixture = { components = 2, seed = -1 }"), "stream[0].mixture.seed", "-1", "from 0"),
    (minimal("regression = { y = 'z', x = 'ms' }"), "stream[0].regression.y", "'z'",
     "not one of the stream's fields"),
    (minimal("regression = { x = 'ms' }"), "stream[0].regression.y", None, "required"),
    (minimal("regression = { y = 'ms', x = 'ms' }"), "stream[0].regression.x", "'ms'",
     "cannot explain itself"),
    (minimal("regression = { y = 'ms', x = [] }"), "stream[0].regression.x", "[]",
     "at least one field"),
    (minimal("regression = { y = 'ms', x = 'q' }"), "stream[0].regression.x", "'q'",
     "not one of the stream's fields"),
    (minimal("regression = { y = 'ms', x = ['intercept'] }").replace(
        'fields = ["ms"]', 'fields = ["ms", "intercept"]'), "stream[0].regression.x",
     "'intercept'", "clashes with the intercept"),
    (minimal("regression = { y = 'ms', x = ['a', 'a'] }").replace(
        'fields = ["ms"]', 'fields = ["ms", "a"]'), "stream[0].regression.x", "['a', 'a']",
     "twice"),
    (minimal("max_series = 0"), "stream[0].max_series", "0", ">= 1"),
    (minimal("idle_expiry = '0s'"), "stream[0].idle_expiry", "'0s'", "longer than zero"),
]


@pytest.mark.parametrize(("text", "key", "shown", "words"), ERRORS,
                         ids=[f"{e[1]}-{i}" for i, e in enumerate(ERRORS)])
def test_errors_name_file_key_and_value(text, key, shown, words):
    exc = error(text)
    message = str(exc)
    assert exc.key == key and exc.origin == "site.toml"
    if shown is None:
        assert message.startswith(f"site.toml: {key} is missing; ")
    else:
        assert message.startswith(f"site.toml: {key} = {shown} ")
    assert words in message


@pytest.mark.parametrize("label", sorted(RESERVED_LABELS))
def test_every_reserved_label_is_refused(label):
    exc = error(minimal().replace("lat.{service}", f"lat.{{{label}}}"))
    assert exc.key == "stream[0].topic" and f"{{{label}}}" in str(exc)


def test_no_did_you_mean_when_nothing_is_close():
    assert "did you mean" not in str(error(minimal("zzzzzz = 1")))


def test_toml_syntax_errors_name_the_file_and_line():
    exc = error("[daemon]\nhttp = \n")
    assert "not valid TOML" in str(exc) and "line 2" in str(exc)


def test_load_config_names_a_missing_file(tmp_path):
    path = tmp_path / "absent.toml"
    with pytest.raises(ConfigError, match=rf"^{path}: cannot be read"):
        load_config(path)


def test_load_config_names_the_file_in_errors(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text(minimal("half_life = 'soon'"))
    with pytest.raises(ConfigError, match=rf"^{path}: stream\[0\]\.half_life = 'soon' "):
        load_config(path)


def test_streams_in_different_shapes_may_coexist():
    cfg = parse_config(minimal(tail=STREAM.replace('"lat"', '"lat2"')
                               .replace("lat.{service}", "lat.{service}.{region}")))
    assert [s.name for s in cfg.streams] == ["lat", "lat2"]


def test_a_log_mixture_is_accepted_for_any_fields():
    cfg = parse_config(minimal("mixture = { components = 2, log = true }")
                       .replace('fields = ["ms"]', 'fields = ["dx", "dy"]'))
    assert cfg.streams[0].mixture.log is True


# ------------------------------------------------------------------ shipped files

def test_embedded_default_loads_with_the_documented_layout():
    cfg = default_config()
    assert cfg.daemon.http == "127.0.0.1:9410" and cfg.daemon.state_file is None
    assert [(s.socket, s.bind) for s in cfg.sources] == [
        ("pull", ("tcp://127.0.0.1:7410",)), ("sub", ("tcp://127.0.0.1:7412",))]
    (s,) = cfg.streams
    assert (s.name, s.topic.text, s.fields) == ("value", "{series}", ("value",))
    assert s.half_life == HalfLife(600.0) and s.quantiles == (0.5, 0.9, 0.99)
    assert s.outlier_sigmas == (3.0, 5.0) and s.mixture.components == 2


def test_embedded_default_is_the_file_in_the_package():
    text = (ROOT / "daemon" / "config" / "default.toml").read_text()
    assert parse_config(text).streams == default_config().streams


EXAMPLES = sorted(glob.glob(str(ROOT / "configs" / "*.toml")))


def test_the_worked_examples_exist():
    assert {Path(p).name for p in EXAMPLES} >= {"latency.toml", "gateway.toml", "trading.toml"}


@pytest.mark.parametrize("path", EXAMPLES, ids=[Path(p).name for p in EXAMPLES])
def test_every_example_config_loads(path):
    cfg = load_config(path)
    assert cfg.origin == path and cfg.streams
    text = describe(cfg)
    for stream in cfg.streams:
        assert stream.name in text and stream.topic.text in text


@pytest.mark.parametrize("path", EXAMPLES, ids=[Path(p).name for p in EXAMPLES])
def test_every_example_is_commented_for_a_newcomer(path):
    text = Path(path).read_text()
    assert sum(line.lstrip().startswith("#") for line in text.splitlines()) >= 5
    tomllib.loads(text)


def test_describe_lists_sources_streams_and_estimators():
    text = describe(parse_config(FULL, "full.toml"))
    assert "configuration full.toml" in text
    assert "https://[::1]:9999/metrics (client certificates required)" in text
    assert "sub  connect tcp://10.0.0.1:5000, ipc:///tmp/x.ipc topics 'lat.', 'px.'" in text
    assert "pair: topic 'px.{pair}.{venue}' (labels: pair, venue)" in text
    assert "100 observations" in text and "correction frequency" in text
    assert "mixture K=3 diag on log values" in text and "regression b ~ a" in text
    assert "quantiles   0.25, 0.75 (from the mixture)" in text
    assert "idle expiry 1m" not in text and "idle expiry 90s" in text
    assert "publish snapshots on tcp://127.0.0.1:7411 every 500ms" in text
    assert "merge snapshots from tcp://127.0.0.1:7421; shards expire after 1m" in text


def test_describe_says_a_sub_source_without_topics_takes_everything():
    assert "sub  bind tcp://127.0.0.1:7412 topics (everything)" in describe(default_config())


def _readme_key_table() -> dict[str, str]:
    """README's table of configuration keys: first key of each row -> its default cell."""
    text = (ROOT / "README.md").read_text()
    rows = re.findall(r"^\| `(\w+)\.(\w+)`[^|]*\| ([^|]+) \|", text, flags=re.M)
    return {f"{table}.{key}": default.strip() for table, key, default in rows}


@pytest.mark.parametrize("table, schema", [("daemon", DaemonConfig), ("source", SourceConfig),
                                           ("stream", StreamConfig)])
def test_readme_key_table_shows_the_schema_defaults(table, schema):
    # the dataclass fields are the one home of each default; the README must agree
    documented = _readme_key_table()
    inline = {"source.connect": "source.bind", "daemon.tls_key": "daemon.tls_cert",
              "daemon.tls_client_ca": "daemon.tls_cert",
              "source.curve_allow": "source.curve_secret"}
    for key in schema_defaults(schema):
        row = inline.get(f"{table}.{key}", f"{table}.{key}")
        assert row in documented, f"README's table of keys has no row for {table}.{key}"
        if row in ("source.bind", "stream.mixture", "stream.regression"):
            continue    # "one required" / inline tables: shown in words, not as one value
        if row == f"{table}.{key}":
            assert documented[row].strip("`") == show_default(schema, key), row


# ------------------------------------------------------------------ thresholds

def test_thresholds_as_a_list_belong_to_a_single_field_stream():
    s = parse_config(minimal("thresholds = [100, 300.0]")).streams[0]
    assert s.thresholds == ((100.0, 300.0),)


def test_thresholds_per_field_and_absent_fields_get_none():
    s = parse_config(SOURCE + STREAM.replace('["ms"]', '["ms", "bytes"]')
                     + "thresholds = { bytes = [1e3, 1e6] }\n").streams[0]
    assert s.thresholds == ((), (1e3, 1e6))


def test_no_thresholds_by_default():
    assert parse_config(minimal()).streams[0].thresholds == ()


TWO = SOURCE + STREAM.replace('["ms"]', '["ms", "bytes"]')


@pytest.mark.parametrize(("text", "key", "shown", "words"), [
    (minimal("thresholds = [300.0, 100.0]"), "stream[0].thresholds.ms", "100.0",
     "increasing"),
    (minimal("thresholds = [100.0, 100.0]"), "stream[0].thresholds.ms", "100.0",
     "increasing"),
    (minimal("thresholds = [100.0, inf]"), "stream[0].thresholds.ms", "inf", "finite"),
    (minimal("thresholds = [nan]"), "stream[0].thresholds.ms", "nan", "finite"),
    (minimal('thresholds = ["300ms"]'), "stream[0].thresholds.ms", "['300ms']", "numbers"),
    (minimal("thresholds = []"), "stream[0].thresholds.ms", "[]", "at least one"),
    (minimal("thresholds = { bytes = [1.0] }"), "stream[0].thresholds.bytes", "[1.0]",
     "not one of the stream"),
    (minimal("thresholds = 300.0"), "stream[0].thresholds", "300.0", "list"),
    (minimal("thresholds = [" + ", ".join(str(i) for i in range(33)) + "]"),
     "stream[0].thresholds.ms", "33", "at most 32"),
    (TWO + "thresholds = [100.0]\n", "stream[0].thresholds", "[100.0]",
     "{ field = [...] }"),
    (TWO + "thresholds = { ms = [5.0, -inf] }\n", "stream[0].thresholds.ms", "-inf",
     "finite"),
])
def test_bad_thresholds_name_stream_field_and_value(text, key, shown, words):
    err = error(text)
    assert err.key == key
    message = str(err)
    assert f"{key} = {shown}" in message or shown in message
    assert words in message
    assert "'lat'" in message          # the stream's name


def test_describe_lists_thresholds():
    text = describe(parse_config(minimal("thresholds = [100.0, 300.0]")))
    assert "thresholds  ms > 100, 300" in text


# ------------------------------------------------- bounds on what one stream may ask
@pytest.mark.parametrize("key", ["quantiles", "outlier_sigmas"])
def test_at_most_32_quantiles_or_thresholds_per_stream(key):
    values = [round(0.01 + i * 0.0009, 4) if key == "quantiles" else 1.0 + i
              for i in range(33)]
    assert len(parse_config(minimal(f"{key} = {values[:32]}\n")).streams[0]
               .__getattribute__(key)) == 32
    exc = error(minimal(f"{key} = {values}\n"))
    assert exc.key == f"stream[0].{key}" and "at most 32" in str(exc)


def test_topic_and_time_ahead_bounds_have_defaults_and_are_checked():
    d = parse_config(minimal()).daemon
    assert (d.max_topic_bytes, d.max_time_ahead) == (256, 10.0)
    d = parse_config(minimal(head='[daemon]\nmax_topic_bytes = 64\nmax_time_ahead = "2s"\n'))
    assert (d.daemon.max_topic_bytes, d.daemon.max_time_ahead) == (64, 2.0)
    assert error(minimal(head="[daemon]\nmax_topic_bytes = 0\n")).key == \
        "daemon.max_topic_bytes"
    assert error(minimal(head='[daemon]\nmax_time_ahead = "soon"\n')).key == \
        "daemon.max_time_ahead"


def test_config_problems_lists_every_bad_key_of_one_table():
    # issue 14: validate reports every problem, not only the first of each table
    from sigmad.daemon.config.load import config_problems

    text = minimal("half_life = 5\ncorrection = \"sometimes\"\nmax_series = 0\n",
                   head="[daemon]\nflush_every = 5\nlog_rejected = -1\nhtpp = 'x:1'\n")
    keys = [p.key for p in config_problems(text)]
    assert sorted(keys) == sorted(["daemon.flush_every", "daemon.log_rejected", "daemon.htpp",
                                   "stream[0].half_life", "stream[0].correction",
                                   "stream[0].max_series"])


def test_config_problems_does_not_invent_a_missing_key_after_a_bad_required_one():
    from sigmad.daemon.config.load import config_problems

    text = minimal('correction = "sometimes"').replace('name = "lat"', 'name = "a b"')
    keys = [p.key for p in config_problems(text)]
    assert keys == ["stream[0].name"]     # a bad required key ends that table's report
