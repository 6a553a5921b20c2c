"""``describe``: a human summary of what a configuration would run (``sigmad validate``)."""

from __future__ import annotations

import math

from sigmad.daemon.config.schema import Config
from sigmad.daemon.config.units import show_duration, show_half_life


def describe(config: Config) -> str:
    """A human summary of what the daemon would run (``sigmad validate`` prints it).

    Examples
    --------
    >>> from sigmad.daemon.config.load import default_config
    >>> print(describe(default_config()).splitlines()[0])
    configuration <embedded default.toml>
    """
    d = config.daemon
    lines = [f"configuration {config.origin}",
             f"  http        {'https' if d.tls_cert else 'http'}://{d.http}/metrics"
             + (" (client certificates required)" if d.tls_client_ca else ""),
             "  state file  " + (f"{d.state_file}, checkpoint every "
                                 f"{show_duration(d.checkpoint_every)}"
                                 if d.state_file else "none (estimates are not persisted)"),
             f"  limits      messages <= {d.max_message_bytes} bytes, <= {d.max_batch_rows} "
             f"rows; flush every {show_duration(d.flush_every)}; event times within "
             f"{show_duration(d.max_clock_skew)} of arrival"]
    lines.append(f"sources ({len(config.sources)})")
    for s in config.sources:
        if s.mqtt is not None:
            m = s.mqtt
            session = (f"session {m.client_id!r} kept {show_duration(m.session_expiry)}"
                       if m.client_id else "no persistent session (no client_id)")
            group = f" shared group {m.shared_group!r}" if m.shared_group else ""
            lines.append(f"  mqtt connect {s.connect[0]} topics {', '.join(s.topics)} "
                         f"qos {m.qos}{group}; {session}")
            continue
        how = "bind" if s.bind else "connect"
        extra = ""
        if s.socket == "sub":
            extra = " topics " + ("(everything)" if s.topics == ("",) else
                                  ", ".join(repr(p) for p in s.topics))
        if s.curve_secret:
            extra += " curve " + (f"allow {s.curve_allow}" if s.curve_allow else "any client")
        lines.append(f"  {s.socket:4} {how} {', '.join(s.endpoints)}{extra}")
    lines.append(f"streams ({len(config.streams)})")
    for st in config.streams:
        labels = ", ".join(st.topic.labels) or "none"
        topics = ", ".join(repr(tpl.text) for tpl in st.templates)
        lines.append(f"  {st.name}: {'topics' if st.legs else 'topic'} {topics} "
                     f"(labels: {labels})")
        lines.append(f"    fields      {', '.join(st.fields)} (d = {st.dim})")
        lines.append(f"    half-life   {show_half_life(st.half_life)}; "
                     f"correction {st.correction}")
        estimates = ["moments"]
        if st.dim > 1:
            estimates.append("covariance/correlation")
        if st.mixture:
            m = st.mixture
            estimates.append(f"mixture K={m.components} {m.covariance}"
                             + (" on log values" if m.log else ""))
        if st.regression:
            r = st.regression
            estimates.append(f"regression {r.y} ~ " + " + ".join(
                (["intercept"] if r.intercept else []) + list(r.x)))
        lines.append(f"    estimates   {'; '.join(estimates)}")
        source = "mixture" if st.mixture else "normal model"
        lines.append("    quantiles   " + (f"{', '.join(f'{q:g}' for q in st.quantiles)} "
                                         f"(from the {source})" if st.quantiles else "none"))
        for name, bounds in zip(st.fields, st.thresholds, strict=False):
            if bounds:
                lines.append(f"    thresholds  {name} > {', '.join(f'{b:g}' for b in bounds)}"
                             " (histogram bounds, exceedance shares)")
        if st.outlier_sigmas:
            lines.append(f"    outliers    beyond {', '.join(f'{s:g}' for s in st.outlier_sigmas)}"
                         f" sigma, after {st.outlier_warmup} observations")
        if st.legs:
            lines.append("    legs        " + ", ".join(f"{f} <- {tpl.text!r}"
                                                        for f, tpl in st.legs)
                         + (f"; a leg older than {show_duration(st.max_leg_age)} forms no row"
                            if st.max_leg_age else ""))
        if st.transform:
            lines.append("    transform   " + ", ".join(f"{f} -> {k}" for f, k in st.transform)
                         + (f"; volatility per {show_duration(st.volatility_unit)}"
                            if st.volatility_unit else ""))
        if st.session_reset:
            lines.append(f"    sessions    reset daily at {st.session_reset.text}, closing "
                         "values exported")
        if st.limits:
            lines.append("    limits      " + ", ".join(
                f"{f} in [{lo:g}, {hi:g}]" for f, (lo, hi) in zip(st.fields, st.limits,
                                                                 strict=True)
                if (lo, hi) != (-math.inf, math.inf)))
        expiry = show_duration(st.idle_expiry) if st.idle_expiry else "never"
        lines.append(f"    series      at most {st.max_series}; idle expiry {expiry}")
    if config.publish:
        lines.append(f"publish snapshots on {', '.join(config.publish.bind)} every "
                     f"{show_duration(config.publish.every)}")
    if config.feed:
        lines.append(f"push estimates on {', '.join(config.feed.bind)} after every flush")
    if config.merge:
        lines.append(f"merge snapshots from {', '.join(config.merge.connect)}; shards expire "
                     f"after {show_duration(config.merge.shard_expiry)}")
    return "\n".join(lines)
