"""The HTTP layer: parses, authorizes, calls the scoring core, stores, responds.

``app.create_app`` builds it; one blueprint per resource (``holdouts``, ``submissions``,
``health``, ``docs``); ``errors`` maps every failure to an RFC 9457 problem once;
``schemas`` describes the wire format, from which ``openapi`` builds the document.
"""
