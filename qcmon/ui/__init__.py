"""The screens of a watch: the plain console (:mod:`qcmon.ui.console`), the terminal dashboard
(:mod:`qcmon.ui.dashboard`, textual) and the choice between them with the watch's keyboard and signals
(:mod:`qcmon.ui.watch`). They listen to the monitor (:class:`qcmon.status.Listener`) and never measure."""
