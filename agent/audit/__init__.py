"""The ethics board's side: policy review against board limits, policy diffs,
ledger verification and the compliance report.

Modules: :mod:`.limits` (board limits file and rule checks), :mod:`.diff`
(plain-language policy changes), :mod:`.schema_doc` (key meanings and the
``docs/policy.md`` tables), :mod:`.verify` (presentation of
:func:`agent.ledger.verify_ledger`), :mod:`.report` (HTML + PNG for one home),
:mod:`.cohort` (the same view from opened bundles' ledger digests).
Import the submodule you need; the report pulls in matplotlib.
"""
