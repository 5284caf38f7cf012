"""coldcert service: everything around the science, in layers.

cli, web  ->  calibrations, archive, queue  ->  record, render, intake  ->  analysis
(storage is the one database module, used by archive, queue and web.)
"""


def __getattr__(name: str):
    # ``service.create_app`` without importing Flask for every CLI command.
    if name == "create_app":
        from service.web.app import create_app

        return create_app
    raise AttributeError(f"module 'service' has no attribute {name!r}")
