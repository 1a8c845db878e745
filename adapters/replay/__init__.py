"""Replays of history: what a config would have done (``leadline replay``, ``leadline tune``).

``history`` reads the CSV history with the followers' own parser into one
array pair per feed; ``runner`` drives the real :class:`~leadline.detector.engine.Engine`
over a group of feeds on reading time with refits inline; ``parallel`` runs
the groups in one process, a process pool or on a Dask cluster; ``writer``
puts the gathered results in a store; ``summary`` counts them; ``labels``
and ``scoring`` judge them against labelled faults (``leadline tune``).
"""
