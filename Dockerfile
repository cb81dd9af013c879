# The closure service image: one image, the command picks the role
# (`closure api ...` or `closure worker ...`, see docker-compose.yml).
FROM python:3.11-slim

ENV PYTHONDONTWRITEBYTECODE=1 PYTHONUNBUFFERED=1 PIP_NO_CACHE_DIR=1
RUN apt-get update && apt-get install -y --no-install-recommends gcc gfortran \
    && rm -rf /var/lib/apt/lists/*

WORKDIR /src
COPY pyproject.toml README.md ./
COPY closure ./closure
COPY api ./api
COPY worker ./worker
RUN pip install .

RUN useradd --create-home --uid 1000 closure && mkdir -p /data /store \
    && chown closure /data /store
USER closure
WORKDIR /home/closure
ENTRYPOINT ["closure"]
CMD ["--help"]
