"""The service's config file (TOML): the schema of every table and key, and the lists of keys.

:func:`load_config` reads the file with :mod:`tomllib` into frozen
dataclasses. Every key is checked; every problem is reported at once, each
naming its key path, the value found and what is allowed::

    /etc/leadline/leadline.toml: 2 problems:
      sources.mqtt[1].port = 70000: expected an integer from 1 to 65535
      feeds.defaults.trian_points: unknown key; did you mean "train_points"? (allowed here: ...)

Key paths count entries of an array of tables from 1 in file order
(``sources.csv[2]`` is the second ``[[sources.csv]]``). Relative paths
(CSV globs, TLS and password files, an SQLite store) are taken from the
config file's folder, so the service and the review commands find the same
files whatever their working directory. Problems that do not stop the
service (a glob matching no file yet, a missing environment variable) are
:attr:`Config.warnings`.

Schema
------
``[store]``
    ======================  ========  ==========================================================
    url                     text      SQLAlchemy URL, ``postgresql+psycopg://user@host/db``, or an
                                      SQLite file path. Default: ``leadline.db`` in
                                      ``$STATE_DIRECTORY`` when systemd sets it, else beside the
                                      config. Keep PostgreSQL passwords in ``~/.pgpass`` or
                                      ``PGPASSWORD``.
    flush_interval_s        number    commit staged events at least this often (default 1.0)
    flush_events            integer   ...or as soon as this many events are staged (default 500)
    retry_base_s            number    a failed flush is retried after this long, doubling... (1.0)
    retry_cap_s             number    ...up to this wait (default 60)
    journal                 bool      journal every accepted reading with the events, and
                                      replay it after a crash (default true)
    snapshot_interval_s     number    snapshot every feed's state at least this often (30)
    snapshot_readings       integer   ...or after this many journaled readings (100000)
    snapshot_max_feeds      integer   feeds snapshotted per round at most, those with most new
                                      readings first (2000); a feed with none is skipped
    ======================  ========  ==========================================================

``[[sources.csv]]`` (followed files; any number)
    ======================  ========  ==========================================================
    name                    text      required; unique among all sources (letters, digits, ``._-``)
    path                    text      required; a file or glob such as ``/srv/telemetry/flow-*.csv``
    format                  text      ``"long"`` (time, feed, value per row; default) or ``"wide"``
                                      (time, then one column per feed)
    columns                 table     the file's column names: ``time`` (default ``"timestamp"``);
                                      long: ``feed`` (``"feed"``), ``value`` (``"value"``); wide:
                                      ``feeds`` = { "file column" = "feed id", ... } to read only
                                      those columns (default: every other column, named by header)
    header                  bool      the first line names the columns (default true)
    column_names            list      the names, for files without a header
    feed_prefix             text      prepended to every feed id read (default "")
    delimiter               text      one character (default ``","``)
    decimal                 text      ``"."`` (default) or ``","`` (then use ``delimiter = ";"``)
    time_format             text      ``"iso8601"`` (default), ``"epoch_s"``, ``"epoch_ms"``, or a
                                      strptime pattern such as ``"%d.%m.%Y %H:%M"``
    timezone                text      IANA zone of times written without an offset
    from_start              bool      read files the store has no offset for from byte 0, not from
                                      their end (default false)
    max_feeds               integer   distinct feeds this source may create (default 100000);
                                      readings of further new feeds are rejects (``feed_limit``)
    ======================  ========  ==========================================================

``[[sources.mqtt]]`` (broker subscriptions; any number)
    ======================  ========  ==========================================================
    name                    text      required; unique among all sources
    host, port              text/int  default ``"127.0.0.1"``, 1883 (8883 with ``tls``)
    client_id               text      required, fixed: the broker keeps the session under it
    protocol                text      ``"5"`` (default) or ``"3.1.1"``
    tls                     table     ``ca_file`` (required), ``cert_file`` and ``key_file``
                                      (a client certificate, both or neither)
    username                text      optional
    password_env            text      environment variable holding the password, or
    password_file           text      a file whose first line is the password (never in the config)
    keepalive_s             integer   default 30
    session_expiry_s        integer   MQTT 5: how long the broker keeps the session and its queue
                                      after a disconnect (default 86400); cover the outage you plan for
    receive_maximum         integer   MQTT 5: unacknowledged messages in flight (default 1000)
    queue_size              integer   readings waiting between the network thread and the service
                                      (default 10000)
    max_topic_bytes         integer   longer topics are rejects (``topic_too_long``; default 256)
    max_feeds               integer   distinct feeds this source may create (default 100000)
    topics                  array     required, one table per pattern, see below
    ======================  ========  ==========================================================

    Each of ``topics = [{ ... }, ...]``: ``pattern`` (required; a topic
    filter whose wildcard levels may be named, ``"plant/+site/flow/+meter"``,
    see :mod:`leadline.adapters.sources.topics`), ``feed`` (a feed id
    template of the captured names, ``"{site}/flow/{meter}"``), ``payload``
    (``"number"`` default, ``"json"`` or ``"senml"``), for JSON
    ``value_path`` (default ``"value"``) and ``time_path`` (dotted, or a list
    of keys and indexes), ``time_format`` (``"iso8601"``, ``"epoch_s"``,
    ``"epoch_ms"``), ``timezone``; for SenML ``use_sum`` (read ``bs + s`` of
    cumulative registers); ``qos`` (1 default, or 0).

``[feeds.defaults]`` and ``[[feeds.override]]`` (per-feed options)
    ======================  ========  ==========================================================
    model                   text/tbl  ``"auto"`` (default: chosen by AICc), or { order = [p, d, q],
                                      seasonal = [P, D, Q, s] (s <= 24), trend = "n"|"c"|"t"|"ct" }
    seasonality             list      calendar cycles as Fourier terms: ``["1d:3", "7d:2"]`` (K after
                                      ":"; without it K is chosen by AICc). Default none
    weekend                 bool      add a weekend regressor (default false)
    holidays                list      dates flagged as holidays: ``[2026-12-25, 2027-01-01]``
    timezone                text      IANA time zone of the calendar terms and day flags, such as
                                      ``"Europe/London"``: days follow its clock through
                                      daylight-saving changes (default none: UTC)
    utc_offset              text      a fixed local time minus UTC instead of ``timezone``:
                                      ``"1h"``, ``"-5h"``, ``"0"`` (default)
    interval                text      nominal reading interval ``"15min"`` (default ``"auto"``: the
                                      median spacing of the training readings)
    train_points            integer   learning ends at this many readings (default 2000, >= 50)...
    train_span              text      ...or once this span is covered, whichever comes first
                                      (default ``"14d"``)
    threshold_mode          text      ``"budget"`` (default: limits from a false-alarm budget) or
                                      ``"sigma"`` (fixed limits on z)
    false_alarms_per_week   number    the budget (default 0.2, or the ``[site]`` share); budget mode only
    limits                  table     rule limits: sigma mode takes any of ``warning_abs_z`` (4),
                                      ``alarm_abs_z`` (5), ``clear_abs_z``, ``cusum_k`` (0.5),
                                      ``cusum_h`` (5), ``noise_window`` (24),
                                      ``noise_tail_probability``, ``flatline_run_probability_limit``,
                                      ``ewma_lam``, ``ewma_limit_sigmas``, ``cusum_clip_abs_z``,
                                      ``noise_clip_abs_z``; budget mode only ``cusum_k``,
                                      ``noise_window``, ``ewma_lam`` and the two ``*_clip_abs_z``
    rules                   list      innovation rules to run, of ``"spike"``, ``"cusum"``,
                                      ``"ewma"`` (needs ``limits.ewma_lam``), ``"noise_burst"``,
                                      ``"flatline"`` (default: all that are configured)
    range_low, range_high   number    the engineering range; out-of-range readings raise ``range``
    counter                 bool      a cumulative register: readings become interval deltas
    register_size           number    counter feeds: the register rolls over to 0 at this value
    stale_intervals         number    silence, in intervals, before ``stale`` is raised (default 5)
    incident_gap_slots      integer   events of a feed this many intervals apart or closer are one
                                      incident (default 12)
    ======================  ========  ==========================================================

    An override also has ``match``: a glob on the feed id (``"marrowby/flow/*"``)
    or a list of them. Overrides apply in file order over the defaults; a
    later one wins; ``limits`` merge key by key, ``model`` is replaced whole.

``[refit]``
    ======================  ========  ==========================================================
    every                   text      refit each feed this often (default ``"1d"``)
    on_degraded             bool      refit early when the diagnostics degrade (default true)
    window_points           integer   rolling refit window (default: the feed's ``train_points``)
    window_span             text      rolling refit span (default: the feed's ``train_span``)
    workers                 integer   refit processes, at most one per core (default: cores - 1,
                                      at least 1)
    install_delay_slots     integer   a finished fit goes into the stream at the first reading
                                      at or after its request's last slot + this many slots,
                                      waiting for the fit if needed, so a replay after a
                                      crash installs it at the same reading (default 10)
    ======================  ========  ==========================================================

``[publish]`` (optional: alarms to MQTT)
    ======================  ========  ==========================================================
    broker                  text      required: the ``name`` of a ``[[sources.mqtt]]`` entry whose
                                      connection settings are used
    client_id               text      the publisher's own client id (default: the broker entry's
                                      ``client_id`` + ``"-alarms"``)
    topic_template          text      default ``"leadline/alarms/{feed}/{rule}"``; ``{feed}``
                                      required, ``{rule}``, ``{severity}`` allowed
    status_topic_template   text      retained per-feed status, default ``"leadline/status/{feed}"``
    max_queued_messages     integer   publisher queue while the broker is away (default 10000)
    ======================  ========  ==========================================================

``[site]`` (optional: the site's false-alarm budget, shared among its feeds)
    ``false_alarms_per_operator_hour`` (required in the table) and
    ``expected_feeds`` (default: the feeds the config names); each feed's
    ``false_alarms_per_week`` default becomes rate x 168 / feeds
    (:mod:`.site`). Setting ``feeds.defaults.false_alarms_per_week`` too is an error.

``[shifts]`` (optional: operator shifts, for ``leadline events --shift``)
    ``timezone`` (IANA name, default ``"UTC"``), then one key per shift:
    ``day = "06:00-18:00"``, ``night = "18:00-06:00"`` (a shift that ends at
    or before its start ends on the next day). Names are letters, digits,
    ``_`` and ``-``; ``last`` and ``current`` are reserved.

For the service
---------------
:meth:`Config.feed_settings` gives one feed's options as plain data, keyed
as :data:`.feeds.BUILTIN_DEFAULTS`: the TOML names, except
``interval_s``, ``train_span_s`` and ``utc_offset_s`` (seconds; ``interval_s``
None for ``"auto"``); ``model`` is ``"auto"`` or ``{"order": [p, d, q],
"seasonal": [P, D, Q, s] or None, "trend": str or None}``; ``seasonality``
is a list of ``{"period_s", "harmonics" (None: choose by AICc)}``;
``holidays`` are :class:`datetime.date`; ``limits`` holds only the keyword
arguments of the feed's threshold mode (``sigma_thresholds`` or
``budget_thresholds``). Sources build their adapters' objects:
:meth:`CsvSourceConfig.layout`, :meth:`MqttSourceConfig.settings` and
:meth:`MqttSourceConfig.subscriptions` (``queue_size`` is the subscriber's
``queue_max_messages``), and :meth:`Config.publisher_settings` for the alarm
publisher.
"""

from __future__ import annotations

import re

DEFAULT_STORE_FILE = "leadline.db"
_SHIFT_NAME = re.compile(r"[A-Za-z][A-Za-z0-9_-]*\Z")
_SHIFT_TIMES = re.compile(r"\s*(\d{1,2}):(\d{2})\s*-\s*(\d{1,2}):(\d{2})\s*\Z")
RESERVED_SHIFT_NAMES = ("last", "current", "timezone")

TOP_KEYS = ("store", "sources", "feeds", "refit", "publish", "shifts", "shelving", "site")
STORE_KEYS = ("url", "flush_interval_s", "flush_events", "retry_base_s", "retry_cap_s", "journal",
              "snapshot_interval_s", "snapshot_readings",
              "snapshot_max_feeds")
REFIT_KEYS = ("every", "on_degraded", "window_points", "window_span", "workers", "install_delay_slots")
PUBLISH_KEYS = ("broker", "client_id", "topic_template", "status_topic_template", "max_queued_messages")
EVENT_TOPIC_FIELDS = ("feed", "rule", "severity")
