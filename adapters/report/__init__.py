"""The shift report: the figures of a review window, the plots and the HTML page.

:mod:`.figures` computes the shift's figures from the store (alarm rates,
floods, top feeds, repeating, standing, unacknowledged, shelved and stale
feeds); :mod:`.plots` draws them and each incident with matplotlib (Agg,
inline SVG); :mod:`.template` is the self-contained HTML page. The commands
are ``leadline report`` and ``leadline summary`` (:mod:`leadline.adapters.cli`).
matplotlib and Jinja2 come with the ``report`` extra.
"""
