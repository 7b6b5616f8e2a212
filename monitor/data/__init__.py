"""Closes in: CSV parsing and validation, returns, data quality."""
