"""Renderings of the record: HTML, PDF, DCC XML, and the plots they embed."""
