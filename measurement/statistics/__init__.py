"""Reliability, validity, scale scores and team statistics, and the stages that report them."""
