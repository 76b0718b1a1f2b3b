"""Sub-commands that live with their own features (the quality sheet, training)."""
