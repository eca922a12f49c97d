"""Jobs waiting for a bench and the worker that runs them one after another, unattended.

May import run/ and everything below it; never cli/.
"""
