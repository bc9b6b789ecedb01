"""The ``lotproof`` command line, a thin layer over the jobs and stages.

``main`` holds the command group and the entry point; the other modules each
register a family of commands on it.
"""
