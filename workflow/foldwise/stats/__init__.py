"""Group statistics: tests, permutation group test, family-wise correction, prevalence."""
