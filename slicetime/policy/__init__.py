"""The lab policy: what a lab expects of its runs and how it reads findings.

One package in one layer, the readers layer (tests/test_layers.py; DEVELOPERS.md,
"Decisions", says why): it imports the model, the catalogue of codes, the schemes and
the readers' error helpers, never the rules; the rules and the pipelines import it.

* :mod:`slicetime.policy.model`: the frozen value types
  (:class:`~slicetime.policy.model.Policy`, ``ExpectedProtocol``, ``IgnoreEntry``); no I/O;
* :mod:`slicetime.policy.patterns`: code and path patterns; pure;
* :mod:`slicetime.policy.loading`: finding, reading and validating
  ``slicetime-policy.toml`` (TOML, the shipped JSON Schema), and loading the policy
  of every dataset root of a batch;
* :mod:`slicetime.policy.checks`: the protocol checks, severity overrides and
  ignores (findings of the ``policy/*`` codes declared in the catalogue); pure.

This module imports none of them, so importing one never loads the others.
"""
