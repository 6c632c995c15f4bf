"""The lab policy: what a lab expects of its runs and how it reads findings.

One package, four modules at their own layers (tests/test_layers.py):

* :mod:`slicetime.policy.model` (model layer): the frozen value types
  (:class:`~slicetime.policy.model.Policy`, ``ExpectedProtocol``, ``IgnoreEntry``,
  ``SchemeFamily``); no I/O;
* :mod:`slicetime.policy.patterns` (model layer): code and path patterns; pure;
* :mod:`slicetime.policy.loading` (readers layer): finding, reading and
  validating ``slicetime-policy.toml`` (TOML, the shipped JSON Schema), and
  loading the policy of every dataset root of a batch;
* :mod:`slicetime.policy.checks` (rules layer): the ``policy/*`` rules, the
  protocol checks, severity overrides and ignores; pure.

This module imports none of them, so importing one never loads the others.
"""
