"""The input stage: reading and checking the cohort, the unit table and unit totals."""
