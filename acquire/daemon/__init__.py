"""The running station: the instrument link, the event loop that feeds the engine, the JSON-RPC
server on the Unix socket, the station configuration and the service manager's notifications.
"""
