"""Replaying a controller: recorded episodes, their metrics, traces and animations."""
