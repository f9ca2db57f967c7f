"""Tests of the protocol package: models, durations, compiler, evaluation, derived metrics."""
