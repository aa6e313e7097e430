"""What a session leaves behind: the journal of rows and events (:mod:`qcmon.record.journal`: ``traces.csv``,
``events.jsonl``, atomic writes, the output folder's lock), the summary and exclusions computed from it
(:mod:`qcmon.record.summary`: ``summary.json``, ``exclude.csv``) and the page drawn from both
(:mod:`qcmon.record.report`: ``report.html``). Kept free of imports: the report's plot processes import
:mod:`qcmon.record._plotproc` before anything heavy."""
