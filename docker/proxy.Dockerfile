# The TLS proxy in front of the capnote replicas: Debian's nginx with docker/nginx.conf.
# The certificate and key are mounted at /etc/nginx/tls (see docker/README.md).
FROM debian:bookworm-slim
# Debian's stable nginx: its security fixes come as new package revisions of the same
# version, which a pinned revision would refuse; the base image's tag fixes the release.
# hadolint ignore=DL3008
RUN apt-get update \
    && apt-get install -y --no-install-recommends nginx \
    && rm -rf /var/lib/apt/lists/* /etc/nginx/sites-enabled
COPY docker/nginx.conf /etc/nginx/nginx.conf
EXPOSE 443
# The master binds 443 and reads the key as root; the workers run as www-data.
CMD ["nginx", "-g", "daemon off;"]
