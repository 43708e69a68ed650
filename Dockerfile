# lytestream service image. Build from wheels made on the host, so the build itself needs no network:
#
#   pip wheel . -w wheels
#   docker build -t lytestream .                               # base: the public Python slim image
#   docker build --build-arg BASE=lytestream-base:local -t lytestream .   # any Debian-like base with python3-venv
#
# Run: SQLite in the /data volume by default; LYTESTREAM_DATABASE_URL for PostgreSQL. The service
# refuses to listen on 0.0.0.0 until LYTESTREAM_BASE_URL says how clients reach it:
#
#   docker run -p 8080:8080 -v lytestream-data:/data -e LYTESTREAM_BASE_URL=https://alerts.example.org/fhir lytestream
ARG BASE=python:3.11-slim

FROM ${BASE} AS build
COPY wheels /wheels
# The virtual environment lives where the runtime stage expects it; only it is copied on.
RUN python3 -m venv /opt/lytestream \
 && /opt/lytestream/bin/pip install --no-cache-dir --no-index --find-links /wheels lytestream \
 && /opt/lytestream/bin/lytestream --help >/dev/null

FROM ${BASE}
# A fixed uid, so a volume's owner is the same on every host; no shell login, no home to write.
RUN useradd --system --uid 10001 --user-group --no-create-home --home-dir /nonexistent \
      --shell /usr/sbin/nologin lytestream \
 && mkdir -p /data && chown lytestream:lytestream /data
COPY --from=build /opt/lytestream /opt/lytestream
ENV PATH=/opt/lytestream/bin:$PATH \
    PYTHONDONTWRITEBYTECODE=1 \
    PYTHONUNBUFFERED=1 \
    LYTESTREAM_DATA_DIR=/data
USER 10001:10001
VOLUME ["/data"]
EXPOSE 8080
HEALTHCHECK --interval=30s --timeout=3s --start-period=20s \
  CMD ["/opt/lytestream/bin/python", "-c", "import urllib.request; urllib.request.urlopen('http://127.0.0.1:8080/readyz', timeout=2)"]
CMD ["lytestream", "serve", "--host", "0.0.0.0", "--port", "8080"]
