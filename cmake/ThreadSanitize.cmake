# Initial cache for a ThreadSanitizer build, the configuration for veer's threaded parts (the
# act thread beside the admin loop, the channel table, the histogram recorders and the drift
# monitor read from other threads, the clients):
#     cmake -C cmake/ThreadSanitize.cmake -S . -B build-tsan
# deploy/sanitize.sh uses it. TSan cannot be combined with ASan, so this is a build of its own
# beside CMAKE_BUILD_TYPE=Sanitize (ASan and UBSan).
set(CMAKE_BUILD_TYPE ThreadSanitize CACHE STRING "")
set(CMAKE_C_FLAGS_THREADSANITIZE "-O1 -g -fno-omit-frame-pointer -fsanitize=thread" CACHE STRING "")
set(CMAKE_EXE_LINKER_FLAGS_THREADSANITIZE "-fsanitize=thread" CACHE STRING "")
set(CMAKE_SHARED_LINKER_FLAGS_THREADSANITIZE "-fsanitize=thread" CACHE STRING "")
set(CMAKE_MODULE_LINKER_FLAGS_THREADSANITIZE "-fsanitize=thread" CACHE STRING "")
