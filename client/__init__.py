"""Thin HTTP client and command line of honing."""
