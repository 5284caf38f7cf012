"""The ``coldcert`` command line: ``main`` assembles the sub-commands; handlers import what they use."""
