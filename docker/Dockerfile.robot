# The robot computer's image: numpy, onnxruntime and coreach's runtime modules only (no torch, no MLflow).
# `docker build -f docker/Dockerfile.robot -t coreach-robot .` from the repository root. It fetches the
# fielded bundle from a tracking server over HTTP (proxied artifact access: no storage credentials) into
# /var/lib/coreach/bundles and can show what is current; see compose.yaml (service robot).
FROM python:3.11-slim

ENV PYTHONDONTWRITEBYTECODE=1 \
    PYTHONUNBUFFERED=1 \
    PIP_NO_CACHE_DIR=1 \
    PIP_DISABLE_PIP_VERSION_CHECK=1 \
    COREACH_ROBOT_CACHE=/var/lib/coreach/bundles

# the runtime-only distribution (pipeline/coreach-robot) takes its modules from pipeline/ and plugins/;
# the sources are removed once it is installed
WORKDIR /opt/coreach-src
COPY pipeline ./pipeline
COPY plugins ./plugins
RUN python -m pip install ./pipeline/coreach-robot \
    && rm -rf /opt/coreach-src

# never run as root; the bundle cache is the one writable place (a volume in compose.yaml)
RUN useradd --create-home --uid 10002 --shell /usr/sbin/nologin robot \
    && mkdir -p /var/lib/coreach/bundles \
    && chown robot:robot /var/lib/coreach/bundles
USER robot
WORKDIR /home/robot

ENTRYPOINT ["coreach-robot"]
CMD ["--help"]
