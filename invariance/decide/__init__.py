"""Decisions between nested levels: difference tests, decision rules, rival structures."""
