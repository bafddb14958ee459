"""Findings of a take against its part."""

