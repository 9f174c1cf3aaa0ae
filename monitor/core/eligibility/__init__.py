"""Eligibility: the rule, an animal's figures, the verdict, random assignment and the decision log."""
