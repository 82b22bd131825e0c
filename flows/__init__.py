"""Flows composing the winnow stages, Prefect blocks and the ``winnow`` command line."""
