"""What a library is worth: robustness, stress scenarios, cost-flips fronts, curation."""
