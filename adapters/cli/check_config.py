"""``leadline check-config FILE``: check a config file and summarise what it sets up.

Exit status 0 when the file is usable (warnings are printed), 2 with every
problem listed otherwise. ``--feed ID`` also prints the options a feed id
would get from the defaults and the overrides that match it.
"""

from __future__ import annotations

import sys
from typing import TextIO

from ..config.file import Config, load_config
from ..config.feeds import show


def _seconds(s: float) -> str:
    for unit, size in (("d", 86400), ("h", 3600), ("min", 60)):
        if s >= size and s % size == 0:
            return f"{int(s // size)}{unit}"
    return f"{s:g}s"


def summary(config: Config) -> list[str]:
    lines = [f"store: {config.store.safe_url} (flush every {config.store.flush_interval_s:g} s "
             f"or {config.store.flush_events} events)"]
    for s in config.csv_sources:
        lines.append(f"source {s.name}: CSV {s.format} {s.path}")
    for m in config.mqtt_sources:
        scheme = "mqtts" if m.ca_file else "mqtt"
        lines.append(f"source {m.name}: MQTT {m.protocol} {scheme}://{m.host}:{m.port} as {m.client_id}, "
                     + ", ".join(t.pattern for t in m.topics))
    if not config.sources:
        lines.append("sources: none (the service would have nothing to read)")
    lines.append(f"feeds: defaults + {len(config.feed_overrides)} override(s)"
                 + "".join(f"; {o.path} matches {', '.join(o.match)}" for o in config.feed_overrides))
    r = config.refit
    lines.append(f"refit: every {_seconds(r.every_s)}{', and when diagnostics degrade' if r.on_degraded else ''}; "
                 f"{r.workers} worker(s)")
    if config.publish:
        p = config.publish
        lines.append(f"publish: via {p.broker} as {p.client_id} to {p.topic_template}, "
                     f"status {p.status_topic_template}")
    if config.shifts:
        lines.append("shifts: " + (", ".join(f"{s.name} {s.label}" for s in config.shifts.shifts) or "none")
                     + f" ({config.shifts.timezone})")
    return lines


def run_check_config(args, out: TextIO | None = None, err: TextIO | None = None) -> int:
    out = out or sys.stdout
    err = err or sys.stderr
    config = load_config(args.file)
    print(f"{config.path}: OK", file=out)
    for line in summary(config):
        print(f"  {line}", file=out)
    for feed_id in args.feed or ():
        settings = config.feed_settings(feed_id)
        applied = ", ".join(settings["overrides"]) or "none"
        print(f"feed {feed_id} (overrides: {applied}):", file=out)
        for line in show(settings).splitlines():
            print(f"  {line}", file=out)
    for warning in config.warnings:
        print(f"warning: {warning}", file=err)
    return 0


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "check-config", help="check a config file",
        description="Check a leadline config file (TOML): every problem is listed with its key path, the value "
                    "found and what is allowed. Exit status 0 when the file is usable, 2 otherwise.")
    p.add_argument("file", metavar="FILE", help="the config file, e.g. /etc/leadline/leadline.toml")
    p.add_argument("--feed", action="append", metavar="ID",
                   help="also show the options this feed id gets (repeatable)")
    p.set_defaults(handler=run_check_config)
