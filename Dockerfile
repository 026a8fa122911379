# streamdet daemon image: slim Python, non-root user, config mounted at /etc/streamdet.
FROM python:3.11-slim

RUN useradd --create-home --uid 10001 streamdet
WORKDIR /app
COPY pyproject.toml README.md ./
COPY streamdet ./streamdet
RUN pip install --no-cache-dir . && mkdir -p /var/lib/streamdet && chown streamdet /var/lib/streamdet
COPY config/docker.yaml /etc/streamdet/config.yaml

USER streamdet
ENV STREAMDET_STATE_DIR=/var/lib/streamdet \
    STREAMDET_HEALTH_ADDRESS=0.0.0.0:8734
EXPOSE 8734
ENTRYPOINT ["streamdet"]
CMD ["run", "--config", "/etc/streamdet/config.yaml", "--log-format", "json"]
