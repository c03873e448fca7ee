"""The records schema's Alembic migrations: env.py, steps.py and one module per revision in versions/.

They run programmatically (``service.records.schema.upgrade``, ``sealfold db upgrade``); no alembic.ini.
"""
