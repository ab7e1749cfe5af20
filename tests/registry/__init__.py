"""Team recipes: storage on SQLite and PostgreSQL, keys, HTTP routes, replicas, crashes, deploy."""
