/* uart_shim_posix.c - uart_shim.h on a POSIX tty (host runs of the example, e.g. on a pty). */
#define _POSIX_C_SOURCE 200809L
#include "uart_shim.h"

#include <errno.h>
#include <fcntl.h>
#include <termios.h>
#include <time.h>
#include <unistd.h>

static int fd = -1;
static unsigned char rbuf[256];
static size_t rlen, rpos;

int uart_shim_open(const char *path)
{
    struct termios t;
    fd = open(path, O_RDWR | O_NOCTTY | O_NONBLOCK);
    if (fd < 0) {
        return -1;
    }
    if (tcgetattr(fd, &t) == 0) {
        t.c_iflag &= ~(tcflag_t)(IGNBRK | BRKINT | PARMRK | ISTRIP | INLCR | IGNCR | ICRNL | IXON);
        t.c_oflag &= ~(tcflag_t)OPOST;
        t.c_lflag &= ~(tcflag_t)(ECHO | ECHONL | ICANON | ISIG | IEXTEN);
        t.c_cflag &= ~(tcflag_t)(CSIZE | PARENB);
        t.c_cflag |= CS8;
        cfsetispeed(&t, B115200);
        cfsetospeed(&t, B115200);
        (void)tcsetattr(fd, TCSANOW, &t);
    }
    return 0;
}

int uart_read_byte(void)
{
    if (rpos == rlen) {
        ssize_t n = read(fd, rbuf, sizeof rbuf);
        if (n <= 0) {
            struct timespec ts = {0, 200000}; /* idle: 0.2 ms, so the host run does not spin a core */
            nanosleep(&ts, NULL);
            return -1;
        }
        rlen = (size_t)n;
        rpos = 0;
    }
    return rbuf[rpos++];
}

size_t uart_write(const uint8_t *data, size_t n)
{
    size_t done = 0;
    while (done < n) {
        ssize_t k = write(fd, data + done, n - done);
        if (k < 0) {
            if (errno == EAGAIN || errno == EINTR) {
                continue;
            }
            break;
        }
        done += (size_t)k;
    }
    return done;
}

int64_t board_time_us(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (int64_t)ts.tv_sec * 1000000 + ts.tv_nsec / 1000;
}
