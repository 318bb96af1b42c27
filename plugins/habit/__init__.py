"""Crystal habit: the habit vocabulary, the Wulff crystal model, the shared fit engine, and the steps classify-habit and fit-growth-ratio."""
