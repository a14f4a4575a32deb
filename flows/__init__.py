"""Prefect flows and the command line: the imperative shell around `pipeline`."""
