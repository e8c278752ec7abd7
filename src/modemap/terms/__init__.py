"""Stage 2, terms: the term grammar, the candidate-term library and readable equations."""
