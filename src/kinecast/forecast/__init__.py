"""Forecast, fill and resample from a trained run; render clips a person can watch."""
