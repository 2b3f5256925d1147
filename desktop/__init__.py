"""Trialdesk desktop program (PySide6). Drives trialdesk.core; holds no statistics of its own."""
