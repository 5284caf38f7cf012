"""coldcert service: intake, jobs, certificates, archive, HTTP API and web pages, CLI."""


def __getattr__(name: str):
    # ``service.create_app`` without importing Flask for every CLI command.
    if name == "create_app":
        from service.app import create_app

        return create_app
    raise AttributeError(f"module 'service' has no attribute {name!r}")
