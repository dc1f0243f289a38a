"""Read models behind the pages and the CLI: each returns plain data (DataFrames, dicts, typed
values), never ORM objects. Joins and filters run in SQL."""
