"""Output-voltage controllers."""
