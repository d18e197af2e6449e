"""Scenarios: timed steps against a rig, verdicts and the metrics they judge.

Public names are read from plantrig.sim."""
