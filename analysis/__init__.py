"""The science of coldcert: pure computation on numpy arrays.

Nothing in this package touches files, databases or the web; ``service`` imports it, never the
reverse.
"""
