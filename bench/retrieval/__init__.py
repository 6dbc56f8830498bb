"""Labelled retrieval questions and the deterministic Marrowby Cycle Works corpus they ask about."""
