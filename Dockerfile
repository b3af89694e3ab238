# One image for web, worker and beat; docker-compose.yml picks the command.
FROM python:3.11-slim-bookworm

ENV PYTHONDONTWRITEBYTECODE=1 PYTHONUNBUFFERED=1 \
    LABBOOK_DATA_DIR=/var/lib/labbook LABBOOK_FILES_DIR=/var/lib/labbook/files

RUN useradd --system --home-dir /srv/labbook --shell /usr/sbin/nologin labbook
WORKDIR /srv/labbook
COPY pyproject.toml README.md LICENSE ./
COPY labbook ./labbook
COPY manage.py ./
RUN pip install --no-cache-dir . \
    && mkdir -p /var/lib/labbook/files \
    && chown -R labbook /var/lib/labbook \
    && DEBUG=false SECRET_KEY=build-only-collectstatic-key-not-used-at-run-time-0123456789 \
       python manage.py collectstatic --noinput --verbosity 0 \
    && chown -R labbook /var/lib/labbook

USER labbook
EXPOSE 8000
CMD ["gunicorn", "labbook.wsgi", "--bind", "0.0.0.0:8000", "--workers", "3"]
