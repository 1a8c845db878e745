"""leadline: advisory anomaly alarms for telemetry feeds.

The numeric core is :mod:`leadline.detector`, the I/O around it
:mod:`leadline.adapters`; ``python -m leadline`` runs the ``leadline``
command. This package only joins the two: it imports neither, so importing
the core never loads the adapters.

Its source is ``adapters/_top/`` (``pyproject.toml`` maps it), because the
repository keeps no folder named ``leadline``.
"""
