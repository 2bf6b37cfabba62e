# hindcast's deployable image: a static binary on an empty base with CA
# certificates (HTTPS to object storage) and a non-root user. jobs/*.yaml
# run it as registry.larkspur.example/hindcast:<VERSION>.
#
#   docker build --build-arg VERSION=0.1.0 \
#     --build-arg COMMIT="$(git rev-parse HEAD)" \
#     -t registry.larkspur.example/hindcast:0.1.0 .
#
# image_test.go assembles the same runtime stage with buildah from scratch
# and checks its config; keep the two in step.

ARG GO_VERSION=1.26

FROM golang:${GO_VERSION}-bookworm AS build
ARG VERSION=0.1.0
ARG COMMIT=unknown
WORKDIR /src
COPY go.mod go.sum ./
RUN go mod download
COPY . .
# The build context has no .git (see .dockerignore), so the commit comes from
# the linker; hindcast version and show report it.
RUN CGO_ENABLED=0 go build -trimpath -buildvcs=false \
      -ldflags "-s -w -X main.buildVersion=${VERSION} -X main.buildCommit=${COMMIT}" \
      -o /out/hindcast . \
 && echo 'hindcast:x:65532:65532:hindcast:/nonexistent:/sbin/nologin' > /out/passwd \
 && echo 'hindcast:x:65532:' > /out/group \
 && mkdir -m 1777 /out/tmp

FROM scratch
ARG VERSION=0.1.0
ARG COMMIT=unknown
COPY --from=build /etc/ssl/certs/ca-certificates.crt /etc/ssl/certs/ca-certificates.crt
COPY --from=build /out/passwd /etc/passwd
COPY --from=build /out/group /etc/group
# goals spills its sort runs to os.TempDir().
COPY --from=build /out/tmp /tmp
COPY --from=build /out/hindcast /hindcast
USER 65532:65532
ENTRYPOINT ["/hindcast"]
LABEL org.opencontainers.image.title="hindcast" \
      org.opencontainers.image.description="fleet logs to goal-conditioned training shards" \
      org.opencontainers.image.version="${VERSION}" \
      org.opencontainers.image.revision="${COMMIT}" \
      org.opencontainers.image.source="https://git.larkspur.example/data/hindcast"
