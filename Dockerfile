# CPU-only image of the geotween service. Build: docker build -t geotween .
# Extra package index (for example a CPU-only torch mirror): --build-arg PIP_EXTRA_INDEX_URL=...
FROM python:3.11-slim

ARG PIP_EXTRA_INDEX_URL=""
ENV PIP_NO_CACHE_DIR=1 \
    PYTHONUNBUFFERED=1 \
    GEOTWEEN_REGISTRY=/data/registry

RUN useradd --create-home --uid 10001 geotween
WORKDIR /app
COPY pyproject.toml README.md ./
COPY models ./models
COPY service ./service
RUN if [ -n "$PIP_EXTRA_INDEX_URL" ]; then pip install --extra-index-url "$PIP_EXTRA_INDEX_URL" . ; \
    else pip install . ; fi

RUN mkdir -p /data/registry && chown -R geotween /data
USER geotween
VOLUME ["/data/registry"]
EXPOSE 8000
HEALTHCHECK --interval=30s --timeout=5s --start-period=20s --retries=3 \
  CMD ["python", "-c", "import urllib.request,sys; sys.exit(0 if urllib.request.urlopen('http://127.0.0.1:8000/healthz', timeout=4).status == 200 else 1)"]
CMD ["geotween", "serve", "--host", "0.0.0.0", "--port", "8000"]
