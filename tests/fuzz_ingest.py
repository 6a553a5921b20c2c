"""Coverage-guided fuzz of the decoder and router with atheris (run by test_hostile.py).

Each input is split into a topic and a body and fed to ``Engine.ingest`` and
``flush``. Any exception escaping them is a finding (atheris reports it and
exits non-zero); so is a rejected message that changed a series' state or a
non-finite number in the exported state. Usage::

    python tests/fuzz_ingest.py -atheris_runs=20000
"""

from __future__ import annotations

import math
import sys

import atheris

with atheris.instrument_imports():
    from sigmad.daemon.config.load import parse_config
    from sigmad.daemon.engine.engine import Engine
    from sigmad.daemon.ingest.wire import encode

CONFIG = """
[daemon]
max_message_bytes = 4096
max_batch_rows = 64
max_clock_skew = "1h"

[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:1"

[[stream]]
name = "one"
topic = "a.{k}"
fields = ["v"]
outlier_sigmas = [3.0]

[[stream]]
name = "pair"
topic = "p"
fields = ["x", "y"]
regression = { y = "y", x = ["x"] }
half_life = "10s"

[[stream]]
name = "mix"
topic = "m"
fields = ["v"]
mixture = { components = 2, warmup = 8 }
"""
NOW = 1.7e9
TOPICS = [b"a.x", b"p", b"m", b"zz"]
ENGINE = Engine(parse_config(CONFIG))
ENGINE.ingest(b"a.x", encode({"v": [1.0, 2.0, 4.0]}), NOW)
ENGINE.flush(NOW)


def finite(obj) -> bool:
    if isinstance(obj, float):
        return math.isfinite(obj)
    if isinstance(obj, dict):
        return all(finite(v) for v in obj.values())
    if isinstance(obj, (list, tuple)):
        return all(finite(v) for v in obj)
    return True


def one_input(data: bytes) -> None:
    if not data:
        return
    topic = TOPICS[data[0] % len(TOPICS)]
    before = ENGINE.export_state()
    queued = ENGINE.ingest(topic, data[1:], NOW)
    ENGINE.flush(NOW)
    after = ENGINE.export_state()
    if queued == 0 and after != before:
        raise AssertionError(f"a rejected message changed the state: {data!r}")
    if not finite(after):
        raise AssertionError(f"non-finite state after {data!r}")


if __name__ == "__main__":
    atheris.Setup(sys.argv, one_input)
    atheris.Fuzz()
