"""Running the workflow: the jobs the rule scripts call, and the runner."""
