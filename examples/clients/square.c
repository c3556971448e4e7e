/* Drive the ward cart around a 2 m square through `trundle serve` (protocol 1).
 *
 * POSIX sockets and the C library only.  The kinematics come from the header that
 * `trundle analyze --export c` writes: FORWARD turns wheel rotations into a body
 * displacement (the odometry, from the encoder counts in every reply) and INVERSE
 * turns the wanted body twist into wheel speeds (the commands).  The client never
 * sees the true pose.
 *
 *   trundle analyze scenarios/robots/ward-cart.yaml --export c -o examples/clients/ward_cart.h
 *   cc -Wall -Wextra -O2 -o square examples/clients/square.c -lm
 *   trundle serve examples/clients/square.yaml     (prints: listening on 127.0.0.1:PORT)
 *   ./square 127.0.0.1:PORT
 *
 * Exit status: 0 when the server reports that the scenario's checks passed.
 * The replies are flat JSON objects; this client reads only the keys it needs.
 */
#define _POSIX_C_SOURCE 200112L
#include <math.h>
#include <netdb.h>
#include <netinet/in.h>
#include <netinet/tcp.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/socket.h>
#include <unistd.h>

#include "ward_cart.h"

#define N WARD_CART_N_DRIVEN
#define SIDE 2.0    /* m */
#define SPEED 1.0   /* m/s on a leg */
#define ACCEL 2.0   /* m/s^2, how fast the requested speed changes */
#define TURN 3.0    /* rad/s, largest turn rate */
#define STEPS 5     /* engine steps per command */

static const double PI = 3.14159265358979323846;

static int sock = -1;
static char buf[1 << 16];
static size_t have = 0;
static char line[1 << 16];

/* Read one line (without its newline) into `line`; exits when the server is gone. */
static void read_line(void)
{
    for (;;) {
        char *nl = memchr(buf, '\n', have);
        if (nl) {
            size_t n = (size_t)(nl - buf);
            memcpy(line, buf, n);
            line[n] = '\0';
            memmove(buf, nl + 1, have - n - 1);
            have -= n + 1;
            return;
        }
        if (have == sizeof buf) {
            fprintf(stderr, "reply too long\n");
            exit(2);
        }
        ssize_t got = recv(sock, buf + have, sizeof buf - have, 0);
        if (got <= 0) {
            fprintf(stderr, "server closed the connection\n");
            exit(2);
        }
        have += (size_t)got;
    }
}

static void send_text(const char *text)
{
    size_t len = strlen(text), off = 0;
    while (off < len) {
        ssize_t n = send(sock, text + off, len - off, 0);
        if (n <= 0) {
            perror("send");
            exit(2);
        }
        off += (size_t)n;
    }
}

/* The number after "key": inside the object that follows "object": (or in the whole
 * line when object is NULL). */
static double number(const char *object, const char *key)
{
    const char *from = line;
    char pat[128];
    if (object) {
        snprintf(pat, sizeof pat, "\"%s\":{", object);
        from = strstr(line, pat);
        if (!from) {
            fprintf(stderr, "no %s in: %s\n", object, line);
            exit(2);
        }
    }
    snprintf(pat, sizeof pat, "\"%s\":", key);
    const char *at = strstr(from, pat);
    if (!at) {
        fprintf(stderr, "no %s in: %s\n", key, line);
        exit(2);
    }
    return strtod(at + strlen(pat), NULL);
}

static double wrap(double a)
{
    return a - 2 * PI * floor((a + PI) / (2 * PI));
}

static double per_rev[N], last[N];
static double x, y, theta, t, v;

/* Dead reckoning: count increments -> wheel rotations -> body displacement (FORWARD)
 * -> pose, along the exact arc. */
static void odometry(void)
{
    double d[3] = {0, 0, 0};
    for (int j = 0; j < N; j++) {
        double c = number("counts", WARD_CART_WHEEL_NAMES[j]);
        double dphi = (c - last[j]) * 2 * PI / per_rev[j];
        last[j] = c;
        for (int i = 0; i < 3; i++)
            d[i] += WARD_CART_FORWARD[i][j] * dphi;
    }
    double dx = d[0], dy = d[1];
    if (fabs(d[2]) > 1e-12) {
        double s = sin(d[2]) / d[2], k = (1 - cos(d[2])) / d[2];
        dx = s * d[0] - k * d[1];
        dy = k * d[0] + s * d[1];
    }
    x += cos(theta) * dx - sin(theta) * dy;
    y += sin(theta) * dx + cos(theta) * dy;
    theta += d[2];
}

/* Command body twist (vx, 0, omega) as wheel speeds (INVERSE) for `steps` steps. */
static void go(double vx, double omega, int steps)
{
    char msg[512];
    int n = snprintf(msg, sizeof msg, "{\"wheels\": {");
    for (int j = 0; j < N; j++) {
        double spin = WARD_CART_INVERSE[j][0] * vx + WARD_CART_INVERSE[j][2] * omega;
        n += snprintf(msg + n, sizeof msg - (size_t)n, "%s\"%s\": %.17g", j ? ", " : "",
                      WARD_CART_WHEEL_NAMES[j], spin);
    }
    snprintf(msg + n, sizeof msg - (size_t)n, "}, \"steps\": %d}\n", steps);
    send_text(msg);
    read_line();
    if (strstr(line, "\"error\"") || !strstr(line, "\"counts\"")) {
        fprintf(stderr, "server: %s\n", line);
        exit(2);
    }
    t = number(NULL, "t");
    odometry();
}

static void leg(double x0, double y0, double heading, double dt)
{
    double ux = cos(heading), uy = sin(heading);
    for (;;) {
        double along = (x0 + SIDE * ux - x) * ux + (y0 + SIDE * uy - y) * uy;
        if (along < 0.0005)
            break;
        double cross = (x - x0) * -uy + (y - y0) * ux;
        double want = fmin(fmin(SPEED, 4.0 * along), fmin(v + ACCEL * dt, sqrt(2 * ACCEL * along)));
        v = fmax(want, 0.01);
        go(v, 4.0 * wrap(heading - theta) - 6.0 * cross, STEPS);
    }
    v = 0;
}

static void turn(double heading)
{
    /* settle to two counts of difference between the wheels (0.0012 rad) */
    while (fabs(wrap(heading - theta)) > 0.0012) {
        double err = wrap(heading - theta);
        go(0.0, copysign(fmin(TURN, fmax(0.05, 5.0 * fabs(err))), err), STEPS);
    }
}

int main(int argc, char **argv)
{
    if (argc != 2) {
        fprintf(stderr, "usage: %s HOST:PORT\n", argv[0]);
        return 2;
    }
    char host[256];
    const char *colon = strrchr(argv[1], ':');
    if (!colon || (size_t)(colon - argv[1]) >= sizeof host) {
        fprintf(stderr, "expected HOST:PORT, got %s\n", argv[1]);
        return 2;
    }
    memcpy(host, argv[1], (size_t)(colon - argv[1]));
    host[colon - argv[1]] = '\0';
    struct addrinfo hints, *res;
    memset(&hints, 0, sizeof hints);
    hints.ai_family = AF_UNSPEC;
    hints.ai_socktype = SOCK_STREAM;
    if (getaddrinfo(host, colon + 1, &hints, &res) != 0) {
        fprintf(stderr, "cannot resolve %s\n", argv[1]);
        return 2;
    }
    sock = socket(res->ai_family, res->ai_socktype, res->ai_protocol);
    if (sock < 0 || connect(sock, res->ai_addr, res->ai_addrlen) != 0) {
        perror("connect");
        return 2;
    }
    freeaddrinfo(res);
    int one = 1;
    setsockopt(sock, IPPROTO_TCP, TCP_NODELAY, &one, sizeof one);

    read_line(); /* hello */
    if (number(NULL, "protocol") != 1) {
        fprintf(stderr, "this client speaks protocol 1: %s\n", line);
        return 2;
    }
    double dt = number(NULL, "step") * STEPS;
    for (int j = 0; j < N; j++) {
        per_rev[j] = number("encoders", WARD_CART_WHEEL_NAMES[j]);
        last[j] = number("counts", WARD_CART_WHEEL_NAMES[j]);
    }
    const double cx[4] = {0, SIDE, SIDE, 0}, cy[4] = {0, 0, SIDE, SIDE};
    for (int i = 0; i < 4; i++) {
        leg(cx[i], cy[i], i * PI / 2, dt);
        turn((i + 1) * PI / 2);
    }
    go(0.0, 0.0, 20); /* stand still while the wheels come to rest */
    send_text("{\"bye\": true}\n");
    read_line();
    printf("odometry says x %.4f m, y %.4f m, theta %.2f deg at t=%g s\n", x, y, theta * 180 / PI, t);
    printf("server: %s\n", line);
    close(sock);
    return strstr(line, "\"passed\":true") ? 0 : 1;
}
