"""requant.report."""
