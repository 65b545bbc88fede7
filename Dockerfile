# The Hourwatch image: the service (`hourwatch run`) and the simulator
# (`hourwatch simulate`). Decision support only: see README.md.
FROM python:3.11-slim

ENV PYTHONDONTWRITEBYTECODE=1 \
    PYTHONUNBUFFERED=1 \
    PIP_NO_CACHE_DIR=1

WORKDIR /app

# Dependencies first, so a code change does not reinstall them.
COPY pyproject.toml README.md ./
COPY daemon ./daemon
COPY simulator ./simulator
# Declarative files: device profiles, rules and the escalation policy, scenarios
# (inside simulator/). The service config names these folders explicitly.
COPY device_profiles ./device_profiles
COPY alert_rules ./alert_rules

# Editable, so the bundled folders above stay where the code looks for them.
RUN pip install -e '.[postgresql]' \
 && useradd --system --uid 10001 --home-dir /var/lib/hourwatch hourwatch \
 && mkdir -p /var/lib/hourwatch \
 && chown hourwatch:hourwatch /var/lib/hourwatch

USER hourwatch
VOLUME ["/var/lib/hourwatch"]
EXPOSE 9108

ENTRYPOINT ["hourwatch"]
CMD ["run", "--config", "/etc/hourwatch/hourwatch.toml"]
