#include <stdio.h>
int main(int argc, char **argv) { (void)argc; (void)argv; printf("recoup\n"); return 0; }
