"""Shared fixtures of the fault-injection suite (tests/test_faults_*.py).

``catalogue``: every fault tried, how it is injected and its expected outcome (the one
list the fault table is generated from); ``rigs``: the simulated rig and protocols the
faults are tried on; ``launch``: runs ``fieldrun`` with in-process faults installed (hooks,
a failing disk, a driver exception, a jumping wall clock); ``outcome``: reads what a run
left behind and checks it against the expected outcome; ``results``: records each row's
actual outcome for ``tools/fault_table.py``.
"""
