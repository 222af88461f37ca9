#!/bin/sh
# Make a private CA and a server certificate for the gateway's Mosquitto TLS listener.
#
#   make-certs.sh OUTDIR HOSTNAME [IP ...]
#
# writes OUTDIR/ca.key (keep it offline), ca.crt (give it to every client), server.key and
# server.crt (for Mosquitto). The server certificate names HOSTNAME, localhost, 127.0.0.1
# and every IP given, because clients check the name they connected to against it.
#
# Mosquitto reads the key *after* dropping to user mosquitto: run as root and this script
# makes server.key 0640 root:mosquitto; otherwise do that yourself after copying.
set -eu
if [ $# -lt 2 ]; then
    echo "usage: $0 OUTDIR HOSTNAME [IP ...]" >&2
    exit 2
fi
out=$1
host=$2
shift 2
san="DNS:$host,DNS:localhost,IP:127.0.0.1"
for ip in "$@"; do
    san="$san,IP:$ip"
done

mkdir -p "$out"
cd "$out"
umask 077
openssl req -x509 -new -nodes -newkey rsa:3072 -sha256 -days 3650 \
    -subj "/CN=zeroline gateway CA ($host)" \
    -addext "basicConstraints=critical,CA:TRUE" \
    -addext "keyUsage=critical,keyCertSign,cRLSign" \
    -keyout ca.key -out ca.crt 2>/dev/null
openssl req -new -nodes -newkey rsa:2048 -sha256 -subj "/CN=$host" \
    -keyout server.key -out server.csr 2>/dev/null
printf '%s\n' "subjectAltName=$san" "basicConstraints=critical,CA:FALSE" \
    "keyUsage=critical,digitalSignature,keyEncipherment" "extendedKeyUsage=serverAuth" \
    > server.ext
openssl x509 -req -in server.csr -CA ca.crt -CAkey ca.key -CAcreateserial -days 825 \
    -sha256 -extfile server.ext -out server.crt 2>/dev/null
rm -f server.csr server.ext ca.srl

chmod 0600 ca.key
chmod 0644 ca.crt server.crt
chmod 0640 server.key
if [ "$(id -u)" = 0 ] && getent group mosquitto >/dev/null; then
    chgrp mosquitto server.key
fi
openssl verify -CAfile ca.crt server.crt >/dev/null
echo "$out: ca.crt, server.crt, server.key for $san"
