"""The searches: greedy descent, CP-SAT, and the portfolio that shares a budget between them."""
