"""pytest plugin for flowpost's test kit (fixtures are added by the test-kit work)."""
