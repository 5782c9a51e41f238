"""Runnable examples of integrating with hotbasis over HTTP."""
