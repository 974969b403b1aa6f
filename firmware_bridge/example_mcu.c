/* example_mcu.c - a motor controller's main loop speaking the tinyloc wire protocol.
 *
 * Receives poses (and time-sync requests) from the host, sends wheel odometry at 50 Hz,
 * IMU gravity at 50 Hz and a heartbeat at 1 Hz. Everything is static; nothing blocks;
 * each loop pass handles at most RX_BUDGET received bytes so a flood cannot starve the
 * motor control. Written against uart_shim.h only. On a host build (uart_shim_posix.c)
 * the loop stops after EXAMPLE_RUN_SECONDS (environment) and prints its counters.
 */
#include "tlink.h"
#include "uart_shim.h"

#include <string.h>

#define RX_BUDGET 64
#define ODOM_PERIOD_US 20000
#define HEARTBEAT_PERIOD_US 1000000

static tlink_decoder_t rx;
static uint8_t tx[TLINK_MAX_WIRE];
static uint16_t tx_seq;

/* Latest pose from the host; a real controller would fuse or gate on it. */
static tlink_pose_t last_pose;
static int64_t last_pose_t_us;
static uint32_t poses_received;
static uint32_t poses_trusted; /* quality TRACKING only: the safety rule of the protocol */
static uint32_t tx_short;      /* frames the UART did not take whole */

static void send_frame(size_t n)
{
    if (n != 0 && uart_write(tx, n) != n) {
        tx_short++; /* the far end's decoder drops the partial frame at the next delimiter */
    }
}

static void handle(const tlink_frame_t *f, int64_t now)
{
    tlink_timesync_t ts;
    switch (f->type) {
    case TLINK_TYPE_POSE:
        if (tlink_get_pose(f, &last_pose)) {
            last_pose_t_us = f->t_us;
            poses_received++;
            if (last_pose.quality == TLINK_Q_TRACKING) {
                poses_trusted++;
            }
        }
        break;
    case TLINK_TYPE_TIMESYNC:
        if (tlink_get_timesync(f, &ts) && ts.phase == 0) {
            /* Stamp receipt now, when the frame is complete (not at the top of the loop pass):
             * a receive time taken before the last byte arrived would break the offset's bound. */
            (void)now;
            ts.phase = 1;
            ts.t_receive_us = board_time_us();
            ts.t_transmit_us = board_time_us();
            send_frame(tlink_put_timesync(&ts, tx_seq++, ts.t_transmit_us, tx, sizeof tx));
        }
        break;
    default:
        break; /* status and unknown types: skipped, never fatal */
    }
}

/* One pass of the main loop; returns nothing, keeps all state in statics. */
void example_step(void)
{
    static int64_t next_odom, next_hb;
    static float x, yaw;
    tlink_frame_t f;
    int64_t now = board_time_us();
    int k, b;
    for (k = 0; k < RX_BUDGET && (b = uart_read_byte()) >= 0; k++) {
        if (tlink_decoder_push(&rx, (uint8_t)b, &f)) {
            handle(&f, now);
        }
    }
    if (now >= next_odom) {
        tlink_odometry_t o;
        tlink_imu_t imu;
        memset(&o, 0, sizeof o);
        memset(&imu, 0, sizeof imu);
        x += 0.02f;          /* stand-in for wheel-encoder integration: 1 m/s straight */
        yaw += 0.0f;
        o.x_m = x;
        o.yaw_rad = yaw;
        o.speed_mps = 1.0f;
        o.left_ticks = (int32_t)(x * 1000.0f);
        o.right_ticks = o.left_ticks;
        send_frame(tlink_put_odometry(&o, tx_seq++, now, tx, sizeof tx));
        imu.f[2] = 9.81f;    /* stand-in for the accelerometer: level, at rest */
        send_frame(tlink_put_imu(&imu, tx_seq++, now, tx, sizeof tx));
        next_odom = now + ODOM_PERIOD_US;
    }
    if (now >= next_hb) {
        tlink_heartbeat_t h;
        memset(&h, 0, sizeof h);
        h.uptime_ms = (uint32_t)(now / 1000);
        h.rx_ok = rx.counters.frames_ok;
        h.rx_bad_crc = rx.counters.bad_crc;
        h.rx_resyncs = rx.counters.resyncs;
        send_frame(tlink_put_heartbeat(&h, tx_seq++, now, tx, sizeof tx));
        next_hb = now + HEARTBEAT_PERIOD_US;
    }
}

void example_init(void) { tlink_decoder_init(&rx); }

#ifdef EXAMPLE_HOST
#include <stdio.h>
#include <stdlib.h>
int uart_shim_open(const char *path);

int main(int argc, char **argv)
{
    const char *secs = getenv("EXAMPLE_RUN_SECONDS");
    int64_t end;
    if (argc != 2 || uart_shim_open(argv[1]) != 0) {
        fprintf(stderr, "usage: %s TTY   (e.g. one side of a pseudo-terminal pair)\n", argv[0]);
        return 2;
    }
    example_init();
    end = board_time_us() + (int64_t)(1e6 * (secs ? atof(secs) : 5.0));
    while (board_time_us() < end) {
        example_step();
    }
    printf("{\"poses_received\": %lu, \"poses_trusted\": %lu, \"rx_ok\": %lu, \"rx_bad_crc\": %lu, "
           "\"rx_resyncs\": %lu, \"tx_short\": %lu, \"last_pose_t_us\": %lld, \"last_x_m\": %.3f}\n",
           (unsigned long)poses_received, (unsigned long)poses_trusted, (unsigned long)rx.counters.frames_ok,
           (unsigned long)rx.counters.bad_crc, (unsigned long)rx.counters.resyncs, (unsigned long)tx_short,
           (long long)last_pose_t_us, (double)last_pose.x_m);
    return 0;
}
#endif
