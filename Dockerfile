# Trialogue: a static binary on a minimal, non-root base image.
# Build: docker build -t trialogue .
# Demo:  docker run --rm -p 8080:8080 -v trialogue-data:/data trialogue
# Serve: docker run --rm -p 8080:8080 -v trialogue-data:/data -v "$PWD/study.yaml:/study.yaml:ro" \
#          -e TRIALOGUE_MODEL_KEY trialogue serve --addr 0.0.0.0:8080 --db /data/trialogue.db --study /study.yaml
# Replica on PostgreSQL (no volume needed; the password in PGPASSWORD, not in the URL):
#        docker run --rm -p 8080:8080 -v "$PWD/study.yaml:/study.yaml:ro" -e TRIALOGUE_MODEL_KEY -e PGPASSWORD \
#          trialogue serve --addr 0.0.0.0:8080 --db postgres://trialogue@db.internal:5432/trialogue --study /study.yaml

FROM golang:1.26-bookworm AS build
WORKDIR /src
COPY go.mod go.sum ./
RUN go mod download
COPY . .
RUN CGO_ENABLED=0 go build -trimpath -ldflags="-s -w" -o /out/trialogue ./cmd/trialogue \
 && mkdir -p /out/data

FROM gcr.io/distroless/static-debian12:nonroot
COPY --from=build /out/trialogue /usr/local/bin/trialogue
COPY testdata/demo-study.yaml /usr/share/trialogue/demo-study.yaml
COPY --from=build --chown=65532:65532 /out/data /data
VOLUME /data
WORKDIR /data
USER 65532:65532
EXPOSE 8080
ENTRYPOINT ["/usr/local/bin/trialogue"]
CMD ["demo", "--addr", "0.0.0.0:8080", "--db", "/data/trialogue-demo.db"]
