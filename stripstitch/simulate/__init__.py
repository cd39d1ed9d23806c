"""Ground-truth simulator: synthetic fingers, capacitive front end, swipe motion, capture."""
