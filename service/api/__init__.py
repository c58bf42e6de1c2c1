"""The HTTP face: the FastAPI app, routes per concern, bearer-token access, request guards, errors, the API
documentation and the dashboard's assets.
"""
