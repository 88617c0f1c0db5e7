"""Trials: compare candidates, envelope maps, metrics, reports and plots of finished runs."""
