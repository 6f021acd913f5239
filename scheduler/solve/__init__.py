"""Night plan optimisation: CP-SAT model, greedy dispatch baseline, independent plan checker."""
