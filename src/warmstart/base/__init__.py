"""Plumbing every stage shares: strict settings from mappings, atomic file writes.

Nothing here knows about volumes, corpora or networks, and nothing imports torch; the stages
import this package, never each other, for these helpers.
"""
