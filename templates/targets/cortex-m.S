/* Startup for bare-metal Cortex-M test images written by luforge: vector table, reset handler that enables
   the FPU when the core has one, copies .data, clears .bss, calls main, and leaves through semihosting. */
    .syntax unified
    .thumb

    .section .vectors, "a"
    .align 2
    .global luf_vectors
luf_vectors:
    .word __stack_top
    .word luf_reset
    .rept 14
    .word luf_fault            /* NMI, HardFault, MemManage, BusFault, UsageFault, reserved, SVC, ... */
    .endr

    .text
    .thumb_func
    .global luf_reset
luf_reset:
#if defined(__ARM_FP)
    /* CPACR: full access to CP10 and CP11, or the first float instruction faults (no coprocessor) */
    ldr r0, =0xE000ED88
    ldr r1, [r0]
    orr r1, r1, #(0xF << 20)
    str r1, [r0]
    dsb
    isb
#endif
    ldr r0, =__data_load
    ldr r1, =__data_start
    ldr r2, =__data_end
1:  cmp r1, r2
    bhs 2f
    ldr r3, [r0]
    str r3, [r1]
    adds r0, r0, #4
    adds r1, r1, #4
    b 1b
2:  ldr r1, =__bss_start
    ldr r2, =__bss_end
    movs r3, #0
3:  cmp r1, r2
    bhs 4f
    str r3, [r1]
    adds r1, r1, #4
    b 3b
4:  bl main
    bl luf_exit
5:  b 5b

    .thumb_func
luf_fault:
    movs r0, #99
    bl luf_exit
6:  b 6b

/* int luf_semihost(int op, void *arg): the Arm semihosting call (BKPT 0xAB on M-profile) */
    .thumb_func
    .global luf_semihost
luf_semihost:
    mov r1, r1
    bkpt 0xAB
    bx lr
