"""The web console: tonight across the farms a user may see, each block's night, stations, skill,
and the few changes an agent makes before the evening run (stage, recipient channels, resend).

Built on Starlette with the Jinja2 templates under ``templates/``; served by uvicorn
(``advisory web``).  Reads go through :mod:`advisory.web.queries`, every one limited to the
farms the signed-in user may see (:mod:`advisory.web.auth`).
"""
