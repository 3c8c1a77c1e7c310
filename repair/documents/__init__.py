"""Files: the JSON documents (problem, candidates, constraints) and the public benchmark formats."""
