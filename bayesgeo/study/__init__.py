"""Study runs: the study file, the runner that calls every stage in order, and the manifest."""
