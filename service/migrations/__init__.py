"""Database schema migrations (Alembic): one revision per schema change, applied on start.

``service.storage.Storage.create_schema`` brings any database to the newest revision: a new
database is created by the baseline revision; a database made before migrations existed (same
tables, no ``alembic_version``) is recognised and stamped at the baseline first. Never edit a
revision that has shipped; add a new one (``versions/NNNN_what.py``) with upgrade and downgrade.
"""
