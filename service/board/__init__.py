"""The rapid-response team's board: active Flags live, a patient's trajectory, acknowledgement.

Server-rendered pages on the FHIR service's own process and store; the only scripts are ours and
the vendored charting library, served from this package, so the board works on a hospital network
with no internet. Decision support only.
"""
