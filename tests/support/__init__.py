"""Test harnesses (processes, relays, application endpoints) and reference maths shared by tests.

Not tests themselves: pytest collects nothing here (no ``test_*`` files).  Imported as
``support.<module>``; ``tests/conftest.py`` makes that work from the repository root.
"""
