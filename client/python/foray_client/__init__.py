"""Python client for the Foray planning service.

The session and planning client arrives with the clients work; for now the package offers
`foray_client.probe`, a health and reflection probe that needs only `grpcio`.
"""

__version__ = "0.1.0"
