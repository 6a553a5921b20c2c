"""Checkpoints: the file format, atomic replacement, restore, faults and SIGKILL.

Restored estimates are compared with numpy on the prefix of the stream that
the checkpoint says it holds (its observation count identifies the prefix),
and with the saved state bit for bit (msgpack packs floats as their float64
bits, so equal packed bytes mean equal bits).
"""

from __future__ import annotations

import errno
import hashlib
import logging
import math
import os
import random
import shutil
import signal
import struct
import subprocess
import sys
import time

import msgpack
import numpy as np
import pytest
import sigmad.daemon.storage.checkpoint as cpmod
import sigmad.daemon.storage.columns as columns
from harness import ROOT, Sigmad, free_port, value
from prometheus_client import CollectorRegistry
from sigmad.daemon.client import Producer
from sigmad.daemon.config.load import parse_config
from sigmad.daemon.engine.engine import Engine, view_of
from sigmad.daemon.ingest.wire import encode
from sigmad.daemon.storage.checkpoint import (
    Checkpointer,
    CheckpointError,
    collect_columns,
    decode_checkpoint,
    encode_checkpoint,
    move_aside,
    read_checkpoint,
    restore_checkpoint,
    stream_definitions,
    write_atomically,
)
from sigmad.estimators import Moments

NOW = 1.7e9
# written by the format-1 encoder of commit 43f9e18 from filled_engine()
FORMAT_1 = ROOT / "tests" / "data" / "checkpoint-format-1.bin"
# written by the format-2 encoder of commit 995c23f from filled_engine(), before the
# estimators saved a weight scale and the low-order parts of their means (issue 16)
FORMAT_2 = ROOT / "tests" / "data" / "checkpoint-format-2.bin"

ENGINE_CONFIG = """
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:1"

[[stream]]
name = "lat"
topic = "lat.{svc}"
fields = ["ms"]
mixture = { components = 2, warmup = 10 }

[[stream]]
name = "pair"
topic = "px"
fields = ["a", "b"]
regression = { y = "b", x = ["a"] }
"""


def filled_engine(config: str = ENGINE_CONFIG) -> Engine:
    e = Engine(parse_config(config))
    rng = np.random.default_rng(3)
    for svc in ("api", "web"):
        e.ingest(f"lat.{svc}".encode(), encode({"ms": rng.lognormal(3, 0.5, 200)}), NOW)
    a = rng.normal(size=300)
    e.ingest(b"px", encode({"a": a, "b": 2 * a + rng.normal(size=300)}), NOW)
    e.flush(NOW)
    return e


def checkpoint_bytes(e: Engine, written_at: float = NOW) -> bytes:
    return encode_checkpoint(collect_columns(e), stream_definitions(e), written_at)


def bits(states: list[dict]) -> bytes:
    """The states' exact bits (msgpack writes every float as its float64 bits)."""
    return msgpack.packb(states, use_bin_type=True)


def views_repr(e: Engine) -> list[str]:
    """Every read-out of the engine's snapshot; repr tells NaNs and -0.0 apart exactly."""
    return [repr(v) for _, v in sorted(e.snapshot.series.items())]


# ------------------------------------------------------------------ the format
def test_round_trip_restores_equal_state(tmp_path):
    e = filled_engine()
    path = tmp_path / "s.state"
    write_atomically(path, checkpoint_bytes(e))
    cp = read_checkpoint(path)
    assert cp.version == 2 and cp.written_at == NOW
    fresh = Engine(e.config)
    assert restore_checkpoint(fresh, cp, NOW) == (3, [])
    assert bits(fresh.export_state()) == bits(e.export_state())
    assert views_repr(fresh) == views_repr(e)
    assert bits(cp.series()) == bits(e.export_state())


def test_round_trip_is_exact_for_many_scalar_series_with_odd_states(tmp_path):
    # decayed-to-nothing, single-row, never-timed and negative-zero states: the bits survive
    e = Engine(parse_config(MANY_CONFIG))
    rng = np.random.default_rng(5)
    for i in range(300):
        n = int(rng.integers(1, 4))
        body = {"v": rng.normal(0.0, 10.0 ** rng.integers(-3, 6), n).tolist()}
        if i % 3 == 0:
            body = {"values": body, "time": (NOW - 8e4 * rng.random()) if i % 2 else NOW}
            e.ingest(f"m.{i}".encode(), msgpack.packb(body), NOW)
        else:
            e.ingest(f"m.{i}".encode(), encode(body), NOW)
    e.ingest(b"m.zero", encode({"v": [-0.0]}), NOW)
    for i in range(40):                  # d = 3: covariances and correlations, some of one row
        rows = rng.normal(size=(1 + i % 4, 3)) * [1.0, 1e-3, 1e5]
        e.ingest(f"p.{i}".encode(), encode({"a": rows[:, 0], "b": rows[:, 1],
                                            "c": rows[:, 2]}), NOW)
    e.flush(NOW)
    store = e.stream("m").store          # the stream's series live in columns
    i = store.index[("0",)]
    old = store.moments.state(i)
    old.decay_to(NOW + 1e9)              # every weight decays to nothing: W = 0
    store.moments.set_state(i, old)
    e.flush(NOW)
    fresh = Engine(e.config)
    restored, dropped = restore_checkpoint(fresh, decode_checkpoint(checkpoint_bytes(e)), NOW)
    assert (restored, dropped) == (341, [])
    assert bits(fresh.export_state()) == bits(e.export_state())
    # the bulk read-outs of the restore equal view_of, series by series
    assert [repr(v) for _, v in sorted(fresh.snapshot.series.items())] == \
        [repr(view_of(s)) for s in sorted(e.all_series(), key=lambda s: s.key)]


MANY_CONFIG = """
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:1"

[[stream]]
name = "m"
topic = "m.{i}"
fields = ["v"]
half_life = "1h"
quantiles = [0.5, 0.99]
outlier_sigmas = [3.0]
correction = "frequency"

[[stream]]
name = "pairs"
topic = "p.{i}"
fields = ["a", "b", "c"]
quantiles = [0.1]
"""


def test_a_version_1_file_is_still_read_and_restored_exactly():
    cp = read_checkpoint(FORMAT_1)
    assert cp.version == 1 and len(cp.states) == 3 and cp.blocks == []
    fresh = Engine(parse_config(ENGINE_CONFIG))
    assert restore_checkpoint(fresh, cp, NOW) == (3, [])
    assert bits(fresh.export_state()) == bits(cp.states)
    # reference: numpy's mean of the same draws (seed 3, the first 200 lognormals)
    api = np.random.default_rng(3).lognormal(3, 0.5, 200)
    (state,) = [d for d in fresh.export_state() if d["labels"] == ["api"]]
    assert math.isclose(state["moments"]["mean"][0], float(np.mean(api)), rel_tol=1e-12)
    # and it is written back in the current format, equal bit for bit
    again = Engine(fresh.config)
    restore_checkpoint(again, decode_checkpoint(checkpoint_bytes(fresh)), NOW)
    assert bits(again.export_state()) == bits(cp.states)


def test_a_format_2_file_of_the_previous_estimators_is_still_read_and_restored_exactly():
    cp = read_checkpoint(FORMAT_2)
    assert cp.version == 2
    fresh = Engine(parse_config(ENGINE_CONFIG))
    assert restore_checkpoint(fresh, cp, NOW) == (3, [])
    assert bits(fresh.export_state()) == bits(cp.series())
    # reference: numpy's mean of the same draws (seed 3, the first 200 lognormals)
    api = np.random.default_rng(3).lognormal(3, 0.5, 200)
    (state,) = [d for d in fresh.export_state() if d["labels"] == ["api"]]
    assert math.isclose(state["moments"]["mean"][0], float(np.mean(api)), rel_tol=1e-12)
    # the same engine filled by today's code reads the same, to rounding
    now = {(d["stream"], tuple(d["labels"])): d for d in filled_engine().export_state()}
    for d in fresh.export_state():
        np.testing.assert_allclose(now[(d["stream"], tuple(d["labels"]))]["moments"]["scatter"],
                                   d["moments"]["scatter"], rtol=1e-12)


@pytest.mark.parametrize("damage", ["flip", "truncate", "magic", "version", "empty"])
def test_damaged_files_are_refused_with_the_reason(damage):
    data = bytearray(checkpoint_bytes(filled_engine()))
    if damage == "flip":
        data[len(data) // 2] ^= 0x40
    elif damage == "truncate":
        del data[-100:]
    elif damage == "magic":
        data[0:2] = b"PK"
    elif damage == "version":
        data[8] = 99
    else:
        data = bytearray()
    with pytest.raises(CheckpointError) as err:
        decode_checkpoint(bytes(data), "x.state")
    words = {"flip": "checksum", "truncate": "truncated", "magic": "magic",
             "version": "format version", "empty": "truncated"}[damage]
    assert words in str(err.value) and "x.state" in str(err.value)


def with_header(payload: bytes, version: int = cpmod.FORMAT_VERSION) -> bytes:
    return cpmod._HEADER.pack(cpmod.MAGIC, version, len(payload),
                              hashlib.sha256(payload).digest()) + payload


@pytest.mark.parametrize("version", [1, 2])
def test_a_payload_claiming_a_huge_map_is_refused_at_the_header(version):
    # a valid header and checksum over a payload whose map32 header claims 2**31 - 1 entries
    payload = b"\xdf" + struct.pack(">I", 2**31 - 1) + b"\xa1k" * 4
    data = with_header(payload, version)
    with pytest.raises(CheckpointError, match="not valid msgpack"):
        decode_checkpoint(data)


def blocks_file(blocks: list) -> bytes:
    """A checkpoint with a valid header and checksum around these (maybe damaged) blocks."""
    return with_header(msgpack.packb({"written_at": NOW, "streams": [], "blocks": blocks,
                                      "health": {}}, use_bin_type=True))


def _set(key, value):
    return lambda b: b.__setitem__(key, value)


BLOCK_DAMAGE = {   # damage to the "lat" block -> the field the refusal names
    "not a map": (None, "stream block"),
    "negative count": (_set("n", -1), "n"),
    "huge count claimed": (_set("n", 2**62), "moments.n"),
    "short label column": (lambda b: b["labels"][0].pop(), "labels"),
    "label not a string": (lambda b: b["labels"][0].__setitem__(0, 7), "labels"),
    "thresholds not numbers": (_set("thresholds", ["x"]), "thresholds"),
    "counters not a blob": (_set("observations", [200, 200]), "observations"),
    "short outlier blob": (_set("outliers", b"\0" * 3), "outliers"),
    "short weight blob": (lambda b: b["moments"].__setitem__("W", b"\0" * 8), "W"),
    "moments of another kind": (lambda b: b["moments"].__setitem__("kind", "sums"), "kind"),
    "moments of another version": (lambda b: b["moments"].__setitem__("version", 9),
                                   "version"),
    "clock flags not 0/1": (lambda b: b["moments"].__setitem__("has_clock", b"\2\2"),
                            "has_clock"),
    "mixtures missing": (_set("mixture", None), "mixture"),
    "mixture list too short": (_set("mixture", []), "mixture"),
}


@pytest.mark.parametrize("damage", sorted(BLOCK_DAMAGE))
def test_a_malformed_stream_block_is_dropped_with_the_field_and_the_rest_restored(damage):
    e = filled_engine()
    blocks = [columns.pack(c) for c in collect_columns(e)]
    assert [b["stream"] for b in blocks] == ["lat", "pair"]
    hurt, field = BLOCK_DAMAGE[damage]
    if hurt is None:
        blocks[0] = 5
    else:
        hurt(blocks[0])
    fresh = Engine(e.config)
    restored, dropped = restore_checkpoint(fresh, decode_checkpoint(blocks_file(blocks)), NOW)
    assert restored == 1 and [d["stream"] for d in fresh.export_state()] == ["pair"]
    assert len(dropped) in (1, 2)           # the block as one, or each of its two series
    assert all(reason.startswith(f"{field}:") for _, reason in dropped), dropped


def test_a_malformed_mixture_drops_only_its_series():
    e = filled_engine()
    blocks = [columns.pack(c) for c in collect_columns(e)]
    blocks[0]["mixture"][0]["pi"] = "not numbers"
    fresh = Engine(e.config)
    restored, dropped = restore_checkpoint(fresh, decode_checkpoint(blocks_file(blocks)), NOW)
    assert restored == 2
    assert [(where, reason.split(":")[0]) for where, reason in dropped] == \
        [("lat{svc=api}", "mixture")]


# a damaged mixture may hold a negative variance: its read-outs are NaN, which numpy notes
@pytest.mark.filterwarnings("ignore:invalid value encountered in sqrt:RuntimeWarning")
@pytest.mark.parametrize("version", [1, 2])
def test_random_damage_under_a_valid_checksum_never_crashes_restore_or_inspect(version):
    e = filled_engine()
    if version == 1:
        good = FORMAT_1.read_bytes()[cpmod.HEADER_SIZE:]
    else:
        good = msgpack.packb({"written_at": NOW, "streams": stream_definitions(e),
                              "blocks": [columns.pack(c) for c in collect_columns(e)],
                              "health": {}}, use_bin_type=True)
    rng = random.Random(7)
    outcomes = {"refused": 0, "restored": 0}
    for _ in range(400):
        payload = bytearray(good)
        for _ in range(rng.randint(1, 4)):
            payload[rng.randrange(len(payload))] = rng.randrange(256)
        try:
            cp = decode_checkpoint(with_header(bytes(payload), version))
        except CheckpointError:
            outcomes["refused"] += 1
            continue
        restore_checkpoint(Engine(e.config), cp, NOW)   # drops what is bad, never raises
        cpmod.describe_checkpoint(cp, "fuzzed")
        outcomes["restored"] += 1
    assert outcomes["refused"] > 0 and outcomes["restored"] > 0, outcomes


def test_a_file_over_the_size_limit_is_not_read(tmp_path):
    path = tmp_path / "big.state"
    path.write_bytes(b"\0" * 5000)
    with pytest.raises(CheckpointError, match="exceeds the 4096-byte limit"):
        read_checkpoint(path, max_bytes=4096)


def test_move_aside_never_overwrites(tmp_path):
    a = tmp_path / "s.state"
    a.write_bytes(b"first")
    first = move_aside(a, NOW)
    a.write_bytes(b"second")
    second = move_aside(a, NOW)
    assert first != second
    assert first.read_bytes() == b"first" and second.read_bytes() == b"second"


def test_atomic_write_leaves_no_temporary_and_a_private_file(tmp_path):
    path = tmp_path / "s.state"
    write_atomically(path, b"one")
    write_atomically(path, b"two")
    assert path.read_bytes() == b"two"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.state"]
    assert (path.stat().st_mode & 0o777) == 0o600


# ------------------------------------------------------------------- restore
@pytest.mark.parametrize("version", [1, 2])
def test_changed_stream_is_dropped_with_a_warning_and_the_rest_restored(tmp_path, caplog,
                                                                        version):
    e = filled_engine()
    path = tmp_path / "s.state"
    if version == 1:       # the same engine's state, written by the format-1 encoder
        path.write_bytes(FORMAT_1.read_bytes())
    else:
        write_atomically(path, checkpoint_bytes(e))
    changed = ENGINE_CONFIG.replace('fields = ["a", "b"]', 'fields = ["a", "b", "c"]')
    fresh = Engine(parse_config(changed))
    reg = CollectorRegistry()
    cpr = Checkpointer(str(path), 1.0, reg)
    with caplog.at_level(logging.WARNING, "sigmad.checkpoint"):
        cpr.restore(fresh, NOW, strict=False)
    assert {d["stream"] for d in fresh.export_state()} == {"lat"}
    assert len(fresh.export_state()) == 2
    assert any("pair" in r.message and "fields" in r.message for r in caplog.records)
    assert reg.get_sample_value("sigmad_checkpoint_restored_series") == 2.0
    assert reg.get_sample_value("sigmad_checkpoint_dropped_series") == 1.0


ESTIMATOR_CHANGES = {   # a change to the config -> the estimator the refusal names
    "regression terms": ('x = ["a"]', 'x = ["a", "c"]', "regression"),
    "regression intercept": ('x = ["a"]', 'x = ["a"], intercept = false', "regression"),
    "mixture components": ("components = 2", "components = 3", "mixture"),
    "mixture in log space": ("components = 2", "components = 2, log = true", "mixture"),
}


@pytest.mark.parametrize("version", [1, 2])
@pytest.mark.parametrize("change", sorted(ESTIMATOR_CHANGES))
def test_an_estimator_that_no_longer_fits_its_stream_is_dropped_not_run(version, change):
    # restored as it was, the first flush would have raised in the engine thread
    config = ENGINE_CONFIG.replace('fields = ["a", "b"]', 'fields = ["a", "b", "c"]')
    e = Engine(parse_config(config))
    rng = np.random.default_rng(8)
    e.ingest(b"lat.api", encode({"ms": rng.lognormal(3, 0.5, 50)}), NOW)
    e.ingest(b"px", encode({k: rng.normal(size=40) for k in "abc"}), NOW)
    e.flush(NOW)
    old, new, kind = ESTIMATOR_CHANGES[change]
    fresh = Engine(parse_config(config.replace(old, new)))
    if version == 1:
        dropped = fresh.restore_state(e.export_state(), NOW)
    else:
        restored, dropped = restore_checkpoint(fresh, decode_checkpoint(checkpoint_bytes(e)),
                                               NOW)
        assert restored == 1
    assert [reason.split(":")[0] for _, reason in dropped] == [kind]
    fresh.ingest(b"lat.api", encode({"ms": rng.lognormal(3, 0.5, 50)}), NOW + 1)
    fresh.ingest(b"px", encode({k: rng.normal(size=40) for k in "abc"}), NOW + 1)
    fresh.flush(NOW + 1)
    assert {d["stream"] for d in fresh.export_state()} == {"lat", "pair"}


def test_a_format_1_series_with_outlier_counts_not_matching_its_thresholds_is_dropped():
    # the counts would be indexed by threshold at the next flush
    e = Engine(parse_config(MANY_CONFIG))
    e.ingest(b"m.1", encode({"v": np.arange(100.0)}), NOW)
    e.flush(NOW)
    states = e.export_state()
    states[0]["outliers"] = []
    fresh = Engine(e.config)
    assert [reason.split(":")[0] for _, reason in fresh.restore_state(states, NOW)] == \
        ["outliers"]
    fresh.ingest(b"m.1", encode({"v": [1e6]}), NOW)
    fresh.flush(NOW)
    assert len(fresh.export_state()) == 1


def test_changed_outlier_thresholds_reset_the_counts_and_keep_the_series():
    config = ENGINE_CONFIG.replace('fields = ["ms"]', 'fields = ["ms"]\noutlier_sigmas = [2.0]')
    e = filled_engine(config)
    e.ingest(b"lat.api", encode({"ms": [1e4]}), NOW)      # far out: counted at 2 sigmas
    e.flush(NOW)
    assert [s.outliers for s in e.streams[0].series.values()] == [[1], [0]]
    data = checkpoint_bytes(e)
    same = Engine(e.config)
    restore_checkpoint(same, decode_checkpoint(data), NOW)
    assert [s.outliers for s in same.streams[0].series.values()] == [[1], [0]]
    moved = Engine(parse_config(config.replace("[2.0]", "[2.5]")))
    assert restore_checkpoint(moved, decode_checkpoint(data), NOW) == (3, [])
    assert [s.outliers for s in moved.streams[0].series.values()] == [[0], [0]]


def test_many_dropped_series_are_logged_twenty_by_name_and_the_rest_counted(tmp_path, caplog):
    e = Engine(parse_config(MANY_CONFIG))
    for i in range(30):
        e.ingest(f"m.{i}".encode(), encode({"v": [float(i)]}), NOW)
    e.flush(NOW)
    path = tmp_path / "s.state"
    write_atomically(path, checkpoint_bytes(e))
    fresh = Engine(parse_config(MANY_CONFIG.replace('fields = ["v"]', 'fields = ["w"]')))
    reg = CollectorRegistry()
    with caplog.at_level(logging.WARNING, "sigmad.checkpoint"):
        Checkpointer(str(path), 1.0, reg).restore(fresh, NOW, strict=False)
    named = [r for r in caplog.records if "dropped: fields" in r.getMessage()]
    assert len(named) == 20
    assert any("10 more series dropped" in r.getMessage() for r in caplog.records)
    assert reg.get_sample_value("sigmad_checkpoint_dropped_series") == 30.0


def test_series_over_max_series_are_dropped_with_the_reason():
    e = Engine(parse_config(MANY_CONFIG))
    for i in range(10):
        e.ingest(f"m.{i}".encode(), encode({"v": [float(i)]}), NOW)
    e.flush(NOW)
    smaller = Engine(parse_config(MANY_CONFIG.replace('topic = "m.{i}"',
                                                      'topic = "m.{i}"\nmax_series = 4')))
    restored, dropped = restore_checkpoint(smaller, decode_checkpoint(checkpoint_bytes(e)), NOW)
    assert restored == 4 and len(dropped) == 6
    assert all("max_series" in reason for _, reason in dropped)
    assert len(smaller.snapshot.series) == 4


def test_corrupt_checkpoint_is_moved_aside_counted_and_strict_refuses(tmp_path):
    path = tmp_path / "s.state"
    path.write_bytes(b"not a checkpoint at all, just junk" * 3)
    reg = CollectorRegistry()
    cpr = Checkpointer(str(path), 1.0, reg)
    e = Engine(parse_config(ENGINE_CONFIG))
    cpr.restore(e, NOW, strict=False)
    assert reg.get_sample_value("sigmad_checkpoint_restore_failures_total") == 1.0
    assert not path.exists()
    (aside,) = tmp_path.glob("s.state.corrupt-*")
    assert aside.read_bytes().startswith(b"not a checkpoint")
    path.write_bytes(b"junk again")
    before = path.stat()
    for _ in range(2):   # a service manager's restart refuses again: strictness lasts
        with pytest.raises(CheckpointError, match="strict_restore"):
            Checkpointer(str(path), 1.0, CollectorRegistry()).restore(e, NOW, strict=True)
    # left where and as it was: same bytes, same inode, same modification time
    assert path.read_bytes() == b"junk again"
    after = path.stat()
    assert (after.st_ino, after.st_mtime_ns) == (before.st_ino, before.st_mtime_ns)
    assert len(list(tmp_path.glob("s.state.corrupt-*"))) == 1


@pytest.mark.slow
def test_strict_restore_makes_the_cli_exit_2_with_one_sentence(tmp_path):
    (tmp_path / "s.state").write_bytes(b"junk")
    (tmp_path / "c.toml").write_text(
        f'[daemon]\nhttp = "127.0.0.1:{free_port()}"\nstate_file = "s.state"\n'
        'strict_restore = true\n' + ENGINE_CONFIG.replace("tcp://127.0.0.1:1",
                                                          f"tcp://127.0.0.1:{free_port()}"))
    r = subprocess.run([sys.executable, "-m", "sigmad.daemon", "run", "--config", "c.toml"],
                       cwd=tmp_path, capture_output=True, text=True, timeout=30,
                       env=dict(os.environ, PYTHONPATH=str(ROOT)))
    assert r.returncode == 2
    assert r.stderr.count("\n") == 1 and "refusing to start" in r.stderr
    assert "left in place" in r.stderr
    assert (tmp_path / "s.state").read_bytes() == b"junk"
    assert not list(tmp_path.glob("s.state.corrupt-*"))


def test_what_the_engine_thread_collects_is_not_changed_by_later_updates():
    # the writer thread packs the columns while the engine thread goes on updating
    e = filled_engine(ENGINE_CONFIG.replace('fields = ["ms"]',
                                            'fields = ["ms"]\noutlier_sigmas = [2.0]'))
    before = bits(e.export_state())
    collected = Checkpointer("unused", 1.0, CollectorRegistry()).collect(e)
    for _ in range(3):
        e.ingest(b"lat.api", encode({"ms": [1e4, 10.0]}), NOW + 5)
        e.ingest(b"px", encode({"a": [1.0], "b": [9.0]}), NOW + 5)
        e.flush(NOW + 5)
    assert bits(e.export_state()) != before
    assert bits(decode_checkpoint(encode_checkpoint(collected, [], NOW)).series()) == before


def test_a_failed_write_is_counted_and_keeps_the_old_file(tmp_path, monkeypatch):
    path = tmp_path / "s.state"
    e = filled_engine()
    reg = CollectorRegistry()
    cpr = Checkpointer(str(path), 1.0, reg)
    assert cpr.final(e, NOW)
    good = path.read_bytes()

    def full_disk(fd):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(cpmod.os, "fsync", full_disk)
    assert not cpr._write(cpr.collect(e), [], NOW + 1, {})
    monkeypatch.undo()
    assert reg.get_sample_value("sigmad_checkpoint_failures_total") == 1.0
    assert path.read_bytes() == good
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.state"]


@pytest.mark.slow
def test_inspect_prints_series_and_estimates(tmp_path):
    e = filled_engine()
    path = tmp_path / "s.state"
    write_atomically(path, checkpoint_bytes(e))
    api = Moments.from_dict(next(d for d in e.export_state()
                                 if d["labels"] == ["api"])["moments"])
    for state_file, version in ((path, 2), (FORMAT_1, 1)):
        r = subprocess.run([sys.executable, "-m", "sigmad.daemon", "inspect", str(state_file)],
                           capture_output=True, text=True, timeout=30,
                           env=dict(os.environ, PYTHONPATH=str(ROOT)))
        assert r.returncode == 0, r.stderr
        assert f"format {version}," in r.stdout and "3 series" in r.stdout
        assert f"{api.mean[0]:.6g}" in r.stdout
        assert "regression coefficients" in r.stdout and "mixture weights" in r.stdout


# -------------------------------------------------------- daemon-level faults
DAEMON_CONFIG = """
[daemon]
http = "{HTTP}"
state_file = "%(state)s"
checkpoint_every = "100ms"
flush_every = "20ms"

[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:%(port)d"

[[stream]]
name = "k"
topic = "k.main"
fields = ["v"]

[[stream]]
name = "f"
topic = "f.{i}"
fields = ["v"]
max_series = 5000
"""


@pytest.mark.slow
def test_unwritable_state_directory_is_retried_while_ingest_goes_on(tmp_path):
    port = free_port()
    missing = tmp_path / "not-yet"
    d = Sigmad(tmp_path, DAEMON_CONFIG % {"state": missing / "s.state", "port": port})
    try:
        assert missing.is_dir()   # created at start: its parent exists
        shutil.rmtree(missing)
        missing.write_text("a file where the directory was")   # every write now fails
        with Producer(f"tcp://127.0.0.1:{port}", source="t") as p:
            p.send("k.main", {"v": [1.0, 2.0, 3.0]})
        d.wait_for("sigmad_checkpoint_failures_total", 3)
        d.wait_for("sigmad_observations_total", 3, stream="k")
        missing.unlink()
        missing.mkdir()
        d.wait_for("sigmad_checkpoint_writes_total", 1)
    finally:
        assert d.stop() == 0
    cp = read_checkpoint(missing / "s.state")
    assert [s["observations"] for s in cp.series()] == [3]
    assert "checkpoint to" in d.log.read_text() and "retrying" in d.log.read_text()


@pytest.mark.slow
def test_a_daemon_upgraded_over_a_version_1_file_keeps_its_state(tmp_path):
    state = tmp_path / "s.state"
    state.write_bytes(FORMAT_1.read_bytes())
    config = (f'[daemon]\nhttp = "{{HTTP}}"\nstate_file = "{state}"\n'
              'checkpoint_every = "1h"\n' + ENGINE_CONFIG.replace(
                  "tcp://127.0.0.1:1", f"tcp://127.0.0.1:{free_port()}"))
    d = Sigmad(tmp_path, config)
    try:
        parsed = d.metrics()
        assert value(parsed, "sigmad_checkpoint_restored_series") == 3
        assert value(parsed, "sigmad_checkpoint_dropped_series") == 0
        assert value(parsed, "sigmad_series", stream="lat") == 2
    finally:
        assert d.stop() == 0                # the final checkpoint: now in format 2
    cp = read_checkpoint(state)
    assert cp.version == 2
    assert bits(cp.series()) == bits(read_checkpoint(FORMAT_1).states)


KILLS = 20
BATCH = 50
STATS: dict[str, int] = {}


@pytest.mark.slow
def test_sigkill_during_ingest_and_checkpointing_never_tears_the_file(tmp_path):
    rng = np.random.default_rng(20)
    data = rng.normal(5.0, 2.0, 1_500_000)      # the one stream, sent in order
    chooser = random.Random(20)
    state = tmp_path / "s.state"
    port = free_port()
    # checkpoints back to back (a write takes ~10 ms here): many kills land mid-write
    config = (DAEMON_CONFIG % {"state": state, "port": port}).replace('"100ms"', '"30ms"')
    endpoint = f"tcp://127.0.0.1:{port}"

    # set-up: 2000 filler series make each checkpoint about a megabyte, so that
    # a good share of the kills land while one is being written
    d = Sigmad(tmp_path, config, name="setup.toml")
    with Producer(endpoint, source="filler") as p:
        for i in range(2000):
            p.send(f"f.{i}", {"v": float(i)})
    d.wait_for("sigmad_series", 2000, stream="f", timeout=30)
    assert d.stop() == 0

    restored = 0
    mid_write = 0
    for k in range(KILLS):
        d = Sigmad(tmp_path, config, name=f"run{k}.toml")
        parsed = d.metrics()
        # the restart found and restored the last checkpoint
        assert (value(parsed, "sigmad_observations_total", stream="k") or 0.0) == restored
        assert value(parsed, "sigmad_series", stream="f") == 2000
        deadline = time.monotonic() + chooser.uniform(0.05, 0.7)
        pos = restored
        with Producer(endpoint, source="kill", linger=0, send_timeout=1.0) as p:
            while time.monotonic() < deadline and pos + BATCH <= data.size:
                p.send("k.main", {"v": data[pos:pos + BATCH]})
                pos += BATCH
                time.sleep(0.001)     # paced, so the daemon is busy ingesting when killed
            d.proc.send_signal(signal.SIGKILL)
            d.proc.wait(10)
        d.stop()
        mid_write += any(tmp_path.glob(".s.state.tmp-*"))
        cp = read_checkpoint(state)              # never torn: raises on any damage
        series = cp.series()
        (main,) = [s for s in series if s["stream"] == "k"] or [None]
        assert sum(1 for s in series if s["stream"] == "f") == 2000
        if main is None:                         # killed before the first batch arrived
            assert restored == 0
            continue
        n = main["observations"]
        assert n % BATCH == 0 and restored <= n <= pos
        m = Moments.from_dict(main["moments"])
        prefix = data[:n]
        # reference: numpy mean and (ddof=0) variance of the prefix the checkpoint holds
        assert m.count == n
        assert math.isclose(m.mean[0], float(np.mean(prefix)), rel_tol=1e-10)
        assert math.isclose(m.variance("none")[0], float(np.var(prefix)), rel_tol=1e-9)
        restored = n
        for stale in tmp_path.glob(".s.state.tmp-*"):
            stale.unlink()                       # left by the kill; the next run writes anew
    assert not list(tmp_path.glob("s.state.corrupt-*"))
    assert restored > 0
    STATS.update(kills=KILLS, mid_write=mid_write, restored_rows=restored)
    print(f"\nSIGKILL loop: {KILLS} kills survived, {mid_write} during a checkpoint write, "
          f"{restored} rows restored at the end")


COLUMN_STREAM = """
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:1"
[[stream]]
name = "c"
topic = "c.{k}"
fields = ["v"]
half_life = "1h"
outlier_sigmas = [2.0]
outlier_warmup = 2
max_series = MAX
"""


def _column_engine(max_series: int = 100, sigmas: str = "[2.0]", columns: bool = True):
    text = COLUMN_STREAM.replace("MAX", str(max_series)).replace("[2.0]", sigmas)
    return Engine(parse_config(text), columns=columns)


def _fill(e: Engine, ks, start: float) -> None:
    rng = np.random.default_rng(int(start))
    for j in range(6):
        msgs = [(f"c.k{k}".encode(), encode({"v": float(rng.normal(k, 1.0))}))
                for k in ks for _ in range(1 + k % 2)]
        e.ingest_many([t for t, _ in msgs], [b for _, b in msgs], start + j)
        e.flush(start + j)


def test_columns_restore_as_columns_and_go_on_as_the_object_path_would():
    # a column stream's checkpoint is its arrays; restored into columns and into
    # objects, both go on to the same states (the object path is the reference)
    e = _column_engine()
    _fill(e, range(30), NOW)
    assert e.streams[0].store.outliers[:30].sum() > 0
    data = decode_checkpoint(checkpoint_bytes(e))
    cols, objs = _column_engine(), _column_engine(columns=False)
    assert restore_checkpoint(cols, data, NOW)[0] == restore_checkpoint(objs, data, NOW)[0] \
        == 30
    assert bits(cols.export_state()) == bits(e.export_state())
    for x in (cols, objs):
        _fill(x, range(10, 40), NOW + 10)
    assert len(cols.snapshot.series) == len(objs.snapshot.series) == 40
    for key, view in objs.snapshot.series.items():
        got = cols.snapshot.series[key]
        assert (got.observations, got.outlier_counts) == (view.observations,
                                                          view.outlier_counts)
        assert got.mean == pytest.approx(view.mean, rel=1e-12)


def test_columns_restore_refuses_beyond_max_series_and_restarts_changed_outlier_counts():
    e = _column_engine()
    _fill(e, range(30), NOW)
    data = decode_checkpoint(checkpoint_bytes(e))
    small = _column_engine(max_series=20, sigmas="[2.5]")
    restored, dropped = restore_checkpoint(small, data, NOW)
    assert restored == 20 and len(dropped) == 10
    assert all("max_series is reached" in why for _, why in dropped)
    assert dropped[0][0] == "c{k=k20}"
    store = small.streams[0].store
    assert store.n == 20 and not store.outliers[:20].any()     # thresholds changed
    kept = small.snapshot.series[("c", (("k", "k3"),))]
    assert kept.observations == e.snapshot.series[("c", (("k", "k3"),))].observations


LEVELS_STREAM = COLUMN_STREAM.replace('fields = ["v"]', 'fields = ["v"]\nthresholds = BOUNDS')


def _levels_engine(bounds: str = "[5.0, 20.0]", columns: bool = True) -> Engine:
    text = LEVELS_STREAM.replace("MAX", "100").replace("BOUNDS", bounds)
    return Engine(parse_config(text), columns=columns)


def test_columns_with_thresholds_restore_as_columns_and_their_counters_resume():
    # a service-level stream lives in columns too: its counts at thresholds go into the
    # checkpoint and come back as columns, equal to what the object path restores, and
    # both go on to the same counts (counters resume, they do not reset)
    e = _levels_engine()
    assert e.streams[0].store is not None
    _fill(e, range(30), NOW)
    data = decode_checkpoint(checkpoint_bytes(e))
    cols, objs = _levels_engine(), _levels_engine(columns=False)
    assert restore_checkpoint(cols, data, NOW)[0] == restore_checkpoint(objs, data, NOW)[0] \
        == 30
    assert bits(cols.export_state()) == bits(e.export_state())
    before = e.snapshot.series[("c", (("k", "k25"),))].levels.buckets
    for x in (cols, objs):
        _fill(x, range(10, 40), NOW + 10)
    for key, view in objs.snapshot.series.items():
        got = cols.snapshot.series[key].levels
        assert got.buckets == view.levels.buckets and got.value_sums == pytest.approx(
            view.levels.value_sums, rel=1e-12)
        assert got.exceedance_observed[0] == pytest.approx(
            view.levels.exceedance_observed[0], rel=1e-12, abs=1e-15)
    after = cols.snapshot.series[("c", (("k", "k25"),))].levels.buckets
    assert after[0][-1] == before[0][-1] + 12     # 6 drains of 2 rows on top


@pytest.mark.parametrize("writer", ["columns", "objects"])
def test_columns_with_thresholds_drop_only_a_malformed_series_and_restart_changed_bounds(
        writer):
    # a column stream writes its counts as blobs (threshold_columns), a stream kept as
    # objects one map per series (threshold_counts): a restore into columns reads both,
    # and a series whose counts are malformed is dropped alone, named
    e = _levels_engine(columns=writer == "columns")
    _fill(e, range(10), NOW)
    data = decode_checkpoint(checkpoint_bytes(e))
    block = data.blocks[0]
    if writer == "columns":
        assert block["threshold_counts"] is None
        saved = block["threshold_columns"][0]
        cum = np.frombuffer(saved["cumulative"], "<f8").reshape(10, 3).copy()
        cum[3, 1] = math.nan
        saved["cumulative"] = cum.astype("<f8").tobytes()
    else:
        assert "threshold_columns" not in block
        block["threshold_counts"][3][0]["state"]["cumulative"] = [1.0, "x", 3.0]
    cols = _levels_engine()
    restored, dropped = restore_checkpoint(cols, data, NOW)
    assert restored == 9 and len(dropped) == 1
    assert dropped[0][0] == "c{k=k3}" and "threshold" in dropped[0][1]
    assert ("c", (("k", "k3"),)) not in cols.snapshot.series
    moved = _levels_engine("[6.0, 20.0]")        # other bounds: the counts start afresh
    assert restore_checkpoint(moved, decode_checkpoint(checkpoint_bytes(e)), NOW)[0] == 10
    v = moved.snapshot.series[("c", (("k", "k4"),))]
    assert v.levels.buckets == ((0.0, 0.0, 0.0),) and v.observations > 0


def test_threshold_columns_of_the_wrong_size_drop_their_block_naming_the_field():
    e = _levels_engine()
    _fill(e, range(10), NOW)
    data = decode_checkpoint(checkpoint_bytes(e))
    data.blocks[0]["threshold_columns"][0]["above"] = b"\0" * 8
    cols = _levels_engine()
    restored, dropped = restore_checkpoint(cols, data, NOW)
    assert restored == 0 and len(dropped) == 1 and "above" in dropped[0][1]


def test_threshold_columns_restore_into_objects_and_inspect_as_maps():
    # a stream that now keeps objects (a mixture added) still takes the counts a column
    # stream wrote; sigmad inspect's per-series maps show them
    e = _levels_engine()
    _fill(e, range(10), NOW)
    raw = checkpoint_bytes(e)
    objs = _levels_engine(columns=False)
    assert restore_checkpoint(objs, decode_checkpoint(raw), NOW)[0] == 10
    for key, view in e.snapshot.series.items():
        assert objs.snapshot.series[key].levels == view.levels
    states = decode_checkpoint(raw).series()
    assert states[0]["threshold_counts"][0]["field"] == "v"
    assert states[0]["threshold_counts"][0]["state"]["bounds"] == [5.0, 20.0]
