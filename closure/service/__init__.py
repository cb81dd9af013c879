"""The service side of closure, apart from the science: the model store and its SQL catalog
(store.py), the embedded local stack (localstack.py: our own Redis, the API, the workers) and
the HTTP client (client.py). The science modules beside this package import none of it; the
server processes themselves live in api/ and worker/.

The old paths ``closure.store``, ``closure.localstack`` and ``closure.client`` stay as aliases
of these modules (the same module objects) for one release.
"""
