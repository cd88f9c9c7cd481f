"""Condition patterns from BOLD runs: HRF, design matrices, estimators (OLS, AR(1), LSS/LSA)."""
