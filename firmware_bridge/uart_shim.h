/* uart_shim.h - the two functions the example main loop needs from the board's UART driver,
 * plus the board clock. Implement them over the MCU's UART (interrupt-driven ring buffers
 * are the usual choice); uart_shim_posix.c implements them on a POSIX tty for host runs. */
#ifndef UART_SHIM_H
#define UART_SHIM_H

#include <stddef.h>
#include <stdint.h>

/* Next received byte (0..255), or -1 if none is waiting. Must not block. */
int uart_read_byte(void);
/* Queue n bytes for transmission; returns how many were accepted (may be fewer). Must not block. */
size_t uart_write(const uint8_t *data, size_t n);

/* Not UART: the board's monotonic microsecond clock, used for sensor timestamps. */
int64_t board_time_us(void);

#endif
