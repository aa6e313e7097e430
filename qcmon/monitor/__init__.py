"""The monitor joins sources, engine, thresholds, record and screens: the loop over a session's frames
(:mod:`qcmon.monitor.loop`: :class:`~qcmon.monitor.loop.Monitor` for ``watch``, ``summarize``, ``demo`` and the
audit alike), a finished session split over processes (:mod:`qcmon.monitor.split`) and the set-up both processes
share (:mod:`qcmon.monitor._memory`). Kept free of imports: split workers import their module only."""
