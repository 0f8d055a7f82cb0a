# halfwatch service image, used by docker-compose.yml (API, workers, mailer, migrations, mail sink).
FROM python:3.11-slim

ENV PYTHONDONTWRITEBYTECODE=1 PYTHONUNBUFFERED=1 PIP_NO_CACHE_DIR=1 PIP_DISABLE_PIP_VERSION_CHECK=1

WORKDIR /app
# The code and the dashboard's templates and static files (web/ is read from the source tree, so the
# package is installed in editable mode from /app).
COPY pyproject.toml README.md ./
COPY analysis analysis
COPY server server
COPY web web
RUN pip install -e . \
    && useradd --system --uid 10001 --home-dir /app halfwatch \
    && mkdir -p /data /mail && chown halfwatch /data /mail
USER halfwatch

EXPOSE 8000
CMD ["halfwatch", "serve", "--host", "0.0.0.0", "--port", "8000"]
