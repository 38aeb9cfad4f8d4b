"""The state layer: the one package that owns the database (connection, transactions, schema, repositories)."""
