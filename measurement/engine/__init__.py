"""Models as data, the one place that builds them, our ML/FIML engine and its fit statistics."""
