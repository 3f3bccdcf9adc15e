"""Reports for people: pictures of the advice and the checks (and, next to them, text)."""
