"""Independent reference computations shared by test modules: designs rebuilt from what the
tables record and refitted with reference libraries (statsmodels, lifelines)."""
