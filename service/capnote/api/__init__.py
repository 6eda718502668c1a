"""Thin HTTP routers over service functions."""
