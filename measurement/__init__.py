"""samesource measurement core: pure computation, no web code.

Takes item-level survey data and a study design and returns result objects; the service
and the command line call :func:`samesource.pipeline.analyze` and nothing deeper.
"""

__version__ = "0.1.0"
