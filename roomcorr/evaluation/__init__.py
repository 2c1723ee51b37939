"""Deterministic simulated evaluation rooms and the correction's figures of merit."""
