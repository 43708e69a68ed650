# lytestream service image: SQLite in /data by default; set LYTESTREAM_DATABASE_URL for PostgreSQL.
FROM python:3.11-slim
RUN useradd --create-home --uid 10001 lytestream
WORKDIR /app
COPY pyproject.toml README.md ./
COPY service ./service
RUN pip install --no-cache-dir . && mkdir /data && chown lytestream /data
USER lytestream
ENV LYTESTREAM_DATA_DIR=/data
EXPOSE 8080
HEALTHCHECK --interval=30s --timeout=3s CMD python -c "import urllib.request,sys; urllib.request.urlopen('http://127.0.0.1:8080/readyz')" || exit 1
CMD ["lytestream", "serve", "--host", "0.0.0.0", "--port", "8080"]
