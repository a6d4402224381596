#!/usr/bin/env bash
# Make a private CA and one certificate for the scheduler, workers and controller,
# and store them as the Secret forebear-tls (keys ca.pem, tls.crt, tls.key).
#
#   deploy/kubernetes/make-certs.sh [OUT_DIR] [--apply]
#
# Every pod presents the same certificate here; for separate identities make one per
# role from the same CA. Keep OUT_DIR (it holds the CA key) somewhere private.
set -euo pipefail
out=${1:-./forebear-certs}
mkdir -p "$out"
chmod 700 "$out"
days=${DAYS:-90}
openssl req -x509 -newkey rsa:3072 -nodes -days "$days" -subj "/CN=forebear-ca" \
  -keyout "$out/ca.key" -out "$out/ca.pem" 2>/dev/null
openssl req -newkey rsa:3072 -nodes -subj "/CN=forebear-scheduler" \
  -keyout "$out/tls.key" -out "$out/tls.csr" 2>/dev/null
printf "subjectAltName=DNS:forebear-scheduler,DNS:localhost,IP:127.0.0.1\nextendedKeyUsage=serverAuth,clientAuth\n" >"$out/ext.cnf"
openssl x509 -req -in "$out/tls.csr" -CA "$out/ca.pem" -CAkey "$out/ca.key" -CAcreateserial \
  -days "$days" -extfile "$out/ext.cnf" -out "$out/tls.crt" 2>/dev/null
chmod 600 "$out"/*.key
echo "wrote $out/ca.pem, $out/tls.crt, $out/tls.key" >&2
if [ "${2:-}" = "--apply" ]; then
  kubectl create secret generic forebear-tls \
    --from-file=ca.pem="$out/ca.pem" --from-file=tls.crt="$out/tls.crt" --from-file=tls.key="$out/tls.key"
fi
