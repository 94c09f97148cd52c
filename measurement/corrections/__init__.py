"""The key paths re-estimated with the bias corrected or bounded, and their uncertainty."""
