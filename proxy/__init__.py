"""hushql: a PostgreSQL-protocol proxy that answers aggregate SQL with differential privacy."""

__version__ = "0.1.0"
