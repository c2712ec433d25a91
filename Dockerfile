FROM python:3.11-slim
ENV PYTHONDONTWRITEBYTECODE=1 PYTHONUNBUFFERED=1
WORKDIR /app
COPY pyproject.toml README.md ./
COPY config ./config
COPY register ./register
COPY calcs ./calcs
COPY templates ./templates
COPY static ./static
COPY fixtures ./fixtures
COPY manage.py ./
RUN pip install --no-cache-dir . && useradd --create-home ledger && mkdir -p /var/lib/sif-ledger \
    && chown ledger /var/lib/sif-ledger
USER ledger
EXPOSE 8000
