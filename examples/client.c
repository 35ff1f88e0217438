/*
 * A minimal client of `nextword serve` (docs/PROTOCOL.md) in plain C: POSIX sockets and
 * libc only, so it shows everything an input-method engine needs to talk to the service.
 *
 *   cc -std=c99 -O2 -o nextword-client examples/client.c
 *   ./nextword-client [-s SOCKET | -t HOST:PORT] [-k K] [-u USER] 'See you at the '
 *
 * It connects to the Unix socket (default: $XDG_RUNTIME_DIR/nextword.sock, else
 * ./nextword.sock, as the server) or, with -t, to a server started with
 * `nextword serve --tcp HOST:PORT` (IPv6 as [::1]:PORT; loopback addresses only, since the
 * protocol has neither authentication nor encryption), sends one suggest request for the
 * typed text, and prints the answer line as received, e.g.
 *
 *   {"id":1,"ok":true,"suggestions":[{"word":"workshop","prob":0.2407723843316642},...]}
 *
 * Exit status: 0 for an "ok":true answer, 1 for an error answer or a connection problem
 * (message on stderr), 2 for a usage mistake. A real engine keeps the connection open and
 * sends one line per keystroke; the framing below (write a line, read up to '\n') is all
 * it takes.
 */
#define _POSIX_C_SOURCE 200809L

#include <errno.h>
#include <netdb.h>
#include <netinet/in.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/socket.h>
#include <sys/un.h>
#include <unistd.h>

#define MAX_ANSWER (1 << 20) /* answers are small; refuse anything absurd */

/* A growable byte buffer. */
struct buf {
    char *data;
    size_t len, cap;
};

static int buf_put(struct buf *b, const char *s, size_t n) {
    if (b->len + n + 1 > b->cap) {
        size_t cap = b->cap ? b->cap : 256;
        while (b->len + n + 1 > cap) cap *= 2;
        char *p = realloc(b->data, cap);
        if (!p) return -1;
        b->data = p;
        b->cap = cap;
    }
    memcpy(b->data + b->len, s, n);
    b->len += n;
    b->data[b->len] = '\0';
    return 0;
}

static int buf_puts(struct buf *b, const char *s) { return buf_put(b, s, strlen(s)); }

/* Append s as a JSON string: quotes, backslashes and control characters escaped; other
 * bytes (UTF-8 text) pass through unchanged. */
static int buf_put_json_string(struct buf *b, const char *s) {
    if (buf_puts(b, "\"")) return -1;
    for (const unsigned char *p = (const unsigned char *)s; *p; p++) {
        char esc[8];
        if (*p == '"' || *p == '\\') {
            esc[0] = '\\';
            esc[1] = (char)*p;
            if (buf_put(b, esc, 2)) return -1;
        } else if (*p < 0x20) {
            snprintf(esc, sizeof esc, "\\u%04x", *p);
            if (buf_puts(b, esc)) return -1;
        } else if (buf_put(b, (const char *)p, 1)) {
            return -1;
        }
    }
    return buf_puts(b, "\"");
}

static int send_all(int fd, const char *data, size_t len) {
    while (len > 0) {
        ssize_t n = write(fd, data, len);
        if (n < 0) {
            if (errno == EINTR) continue;
            return -1;
        }
        data += n;
        len -= (size_t)n;
    }
    return 0;
}

/* Read one line (without its '\n') into b; -1 on error or if the server closed first. */
static int read_line(int fd, struct buf *b) {
    char chunk[4096];
    for (;;) {
        ssize_t n = read(fd, chunk, sizeof chunk);
        if (n < 0) {
            if (errno == EINTR) continue;
            return -1;
        }
        if (n == 0) {
            errno = ECONNRESET;
            return -1;
        }
        char *nl = memchr(chunk, '\n', (size_t)n);
        if (buf_put(b, chunk, nl ? (size_t)(nl - chunk) : (size_t)n)) return -1;
        if (nl) return 0; /* one request, one answer: nothing follows it */
        if (b->len > MAX_ANSWER) {
            errno = EMSGSIZE;
            return -1;
        }
    }
}

static void usage(void) {
    fprintf(stderr, "usage: nextword-client [-s SOCKET | -t HOST:PORT] [-k K] [-u USER] TYPED_TEXT\n");
}

/* Split "HOST:PORT" or "[IPv6]:PORT" into host and port (in place, in a copy the caller
 * owns); 0 on success, -1 if the text is not of that shape or the port is not 1-65535. */
static int split_host_port(char *text, char **host, char **port) {
    char *colon;
    if (text[0] == '[') {
        char *close = strchr(text, ']');
        if (!close || close[1] != ':') return -1;
        *close = '\0';
        *host = text + 1;
        colon = close + 1;
    } else {
        colon = strrchr(text, ':');
        if (!colon || strchr(text, ':') != colon) return -1; /* an IPv6 address needs [brackets] */
        *colon = '\0';
        *host = text;
    }
    *port = colon + 1;
    if (!**host || !**port || strlen(*port) > 5) return -1;
    long n = 0;
    for (const char *p = *port; *p; p++) {
        if (*p < '0' || *p > '9') return -1;
        n = n * 10 + (*p - '0');
    }
    return n >= 1 && n <= 65535 ? 0 : -1;
}

/* Whether a resolved address is a loopback one: 127.0.0.0/8, ::1 or ::ffff:127.x.y.z. */
static int is_loopback(const struct sockaddr *sa) {
    if (sa->sa_family == AF_INET) {
        const unsigned char *b = (const unsigned char *)&((const struct sockaddr_in *)sa)->sin_addr;
        return b[0] == 127;
    }
    if (sa->sa_family == AF_INET6) {
        const unsigned char *b = ((const struct sockaddr_in6 *)sa)->sin6_addr.s6_addr;
        static const unsigned char one[16] = {0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 1};
        static const unsigned char mapped[12] = {0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0xff, 0xff};
        return memcmp(b, one, 16) == 0 || (memcmp(b, mapped, 12) == 0 && b[12] == 127);
    }
    return 0;
}

/* Connect over TCP to host:port (every loopback address it resolves to, in order).
 * Returns the socket, or -1 with a message printed (*status: 2 usage, 1 connection). */
static int connect_tcp(const char *where, int *status) {
    char *copy = strdup(where), *host, *port;
    if (!copy) {
        fprintf(stderr, "nextword-client: error: out of memory\n");
        *status = 1;
        return -1;
    }
    if (split_host_port(copy, &host, &port) < 0) {
        fprintf(stderr, "nextword-client: error: -t needs HOST:PORT (e.g. 127.0.0.1:7070 or [::1]:7070), got '%s'\n", where);
        free(copy);
        *status = 2;
        return -1;
    }
    struct addrinfo hints, *found = NULL;
    memset(&hints, 0, sizeof hints);
    hints.ai_family = AF_UNSPEC;
    hints.ai_socktype = SOCK_STREAM;
    int rc = getaddrinfo(host, port, &hints, &found);
    if (rc != 0) {
        fprintf(stderr, "nextword-client: error: %s: %s\n", where, gai_strerror(rc));
        free(copy);
        *status = 1;
        return -1;
    }
    int fd = -1, err = ECONNREFUSED, loopback = 0;
    for (struct addrinfo *ai = found; ai && fd < 0; ai = ai->ai_next) {
        if (!is_loopback(ai->ai_addr)) continue;
        loopback = 1;
        fd = socket(ai->ai_family, ai->ai_socktype, ai->ai_protocol);
        if (fd < 0) {
            err = errno;
            continue;
        }
        if (connect(fd, ai->ai_addr, ai->ai_addrlen) < 0) {
            err = errno;
            close(fd);
            fd = -1;
        }
    }
    freeaddrinfo(found);
    free(copy);
    if (!loopback) {
        fprintf(stderr, "nextword-client: error: %s is not a loopback address; the protocol has no encryption\n", where);
        *status = 2;
        return -1;
    }
    if (fd < 0) {
        fprintf(stderr, "nextword-client: error: %s: %s\n", where, strerror(err));
        *status = 1;
    }
    return fd;
}

int main(int argc, char **argv) {
    const char *sock_path = NULL, *tcp = NULL, *user = NULL;
    long k = 3;
    int opt;
    while ((opt = getopt(argc, argv, "s:t:k:u:")) != -1) {
        char *end;
        switch (opt) {
        case 's': sock_path = optarg; break;
        case 't': tcp = optarg; break;
        case 'u': user = optarg; break;
        case 'k':
            errno = 0;
            k = strtol(optarg, &end, 10);
            if (errno || *end || end == optarg || k < 1 || k > 1000) {
                fprintf(stderr, "nextword-client: error: -k must be a whole number from 1 to 1000, got '%s'\n", optarg);
                return 2;
            }
            break;
        default: usage(); return 2;
        }
    }
    if (optind != argc - 1 || (sock_path && tcp)) {
        usage();
        return 2;
    }
    const char *text = argv[optind];

    signal(SIGPIPE, SIG_IGN); /* a server that goes away becomes an error, not a crash */
    char default_path[sizeof(((struct sockaddr_un *)0)->sun_path)];
    int fd;
    if (tcp) {
        int status = 1;
        fd = connect_tcp(tcp, &status);
        if (fd < 0) return status;
        sock_path = tcp; /* named in later error messages */
    } else {
        if (!sock_path) {
            const char *runtime = getenv("XDG_RUNTIME_DIR");
            if (runtime && *runtime && access(runtime, X_OK) == 0)
                snprintf(default_path, sizeof default_path, "%s/nextword.sock", runtime);
            else
                snprintf(default_path, sizeof default_path, "./nextword.sock");
            sock_path = default_path;
        }
        struct sockaddr_un addr;
        memset(&addr, 0, sizeof addr);
        addr.sun_family = AF_UNIX;
        if (strlen(sock_path) >= sizeof addr.sun_path) {
            fprintf(stderr, "nextword-client: error: socket path too long: %s\n", sock_path);
            return 2;
        }
        strcpy(addr.sun_path, sock_path);
        fd = socket(AF_UNIX, SOCK_STREAM, 0);
        if (fd < 0 || connect(fd, (struct sockaddr *)&addr, sizeof addr) < 0) {
            fprintf(stderr, "nextword-client: error: %s: %s\n", sock_path, strerror(errno));
            return 1;
        }
    }

    struct buf req = {0}, answer = {0};
    char num[32];
    snprintf(num, sizeof num, "%ld", k);
    int bad = buf_puts(&req, "{\"id\":1,\"op\":\"suggest\",\"k\":") || buf_puts(&req, num) ||
              buf_puts(&req, ",\"text\":") || buf_put_json_string(&req, text);
    if (!bad && user) bad = buf_puts(&req, ",\"user\":") || buf_put_json_string(&req, user);
    if (!bad) bad = buf_puts(&req, "}\n");
    if (bad) {
        fprintf(stderr, "nextword-client: error: out of memory\n");
        return 1;
    }
    if (send_all(fd, req.data, req.len) < 0 || read_line(fd, &answer) < 0) {
        fprintf(stderr, "nextword-client: error: %s: %s\n", sock_path, strerror(errno));
        close(fd);
        return 1;
    }
    close(fd);
    printf("%s\n", answer.data);
    int ok = strstr(answer.data, "\"ok\":true") != NULL;
    free(req.data);
    free(answer.data);
    return ok ? 0 : 1;
}
