"""Storage: the Store (base.py) with a driver per engine, its tables and migrations."""
