"""Result collectors: recordings (plain arrays) -> tables.

``protolang.measure.collect.collect(plan, recordings)`` builds the tables; ``registry`` holds the
collector names and options the front end checks (and imports nothing heavy).
"""
