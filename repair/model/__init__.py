"""The model and the late constraints as callers state them: Problem, CandidateSet,
constraint classes, integer decisions (one-hot, domain wall)."""
