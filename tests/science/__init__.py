"""Tests of the pure science functions (controller.science)."""
