"""Stages of the Tallywave data path: plain functions over a DuckDB connection."""
