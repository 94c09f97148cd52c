"""Every common-method check, the assumptions behind each correction, the one verdict."""
