"""posteriord daemon."""
