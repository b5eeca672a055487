/* Startup for bare-metal RISC-V test images written by luforge: sets the stack and global pointer, enables
   the FPU (mstatus.FS) when the core has one, copies .data, clears .bss, calls main, leaves by semihosting. */
    .section .text.start, "ax"
    .global _start
_start:
    .option push
    .option norelax
    la gp, __global_pointer$
    .option pop
    la sp, __stack_top
    la t0, luf_trap
    csrw mtvec, t0
#if defined(__riscv_flen)
    li t0, 0x2000                 /* mstatus.FS = initial: float instructions trap while FS is off */
    csrs mstatus, t0
    csrw fcsr, zero
#endif
    la t0, __data_load
    la t1, __data_start
    la t2, __data_end
1:  bgeu t1, t2, 2f
    lw t3, 0(t0)
    sw t3, 0(t1)
    addi t0, t0, 4
    addi t1, t1, 4
    j 1b
2:  la t1, __bss_start
    la t2, __bss_end
3:  bgeu t1, t2, 4f
    sw zero, 0(t1)
    addi t1, t1, 4
    j 3b
4:  call main
    call luf_exit
5:  j 5b

    .align 2
luf_trap:
    li a0, 99
    call luf_exit
6:  j 6b

/* int luf_semihost(int op, void *arg): the RISC-V semihosting sequence, uncompressed and in one page */
    .text
    .align 4
    .global luf_semihost
luf_semihost:
    .option push
    .option norvc
    slli zero, zero, 0x1f
    ebreak
    srai zero, zero, 7
    .option pop
    ret
