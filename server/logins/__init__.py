"""Login attempts shared by every API process (the throttle in ``server/hardening.py`` reads them)."""
