"""Labelling: single-view matching against a prototype library, open-set score, overlays."""
